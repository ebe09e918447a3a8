"""What to propose and what to tell: the cooling-rate law, reference profiles, the guard and the
alarms. Imports nothing else of sigmatrack: what it needs from the soft sensor (the solubility
inverse, the metastable limit, the model's predictor) is handed in as callables."""
