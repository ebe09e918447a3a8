"""The plant simulator: a batch cooling crystallizer, its instruments and faults, a recipe that
behaves like a DCS, and an OPC UA server for it. An independent, higher-fidelity model: it uses
sigmatrack's thermodynamics and site-file types, never the soft sensor's model or filter."""
