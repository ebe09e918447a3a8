"""The simulator's shell: its CSV files, its command and its OPC UA server (the only I/O)."""
