"""Published solubility tables used as outside checks.

Source: CRC Handbook of Chemistry and Physics (W. M. Haynes, ed.), table "Aqueous Solubility of
Inorganic Compounds at Various Temperatures", mass percent of solute (100 w) at 0-100 °C. The
values below are quoted from memory of that table, to its three significant figures; the tests
that use them allow for that (see each tolerance). None of these solutes is used in the demo.
"""

from __future__ import annotations

import numpy as np

CRC_AQUEOUS_SOLUBILITY_TEMPS_C = np.array([0, 10, 20, 25, 30, 40, 50, 60, 70, 80, 90, 100.0])

WATER_MOLAR_MASS_G_PER_MOL = 18.015  # as stated in the CRC table's introduction

# name: (molar mass [g/mol], mass percent at CRC_AQUEOUS_SOLUBILITY_TEMPS_C)
CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT = {
    "K2SO4": (174.26, [6.85, 8.46, 10.0, 10.7, 11.5, 12.9, 14.2, 15.4, 16.5, 17.5, 18.5, 19.3]),
    "(NH4)2SO4": (132.14, [41.3, 42.1, 42.9, 43.3, 43.8, 44.7, 45.6, 46.6, 47.6, 48.6, 49.6, 50.6]),
    "H3BO3": (61.83, [2.52, 3.49, 4.72, 5.46, 6.23, 8.08, 10.3, 12.9, 15.8, 19.1, 23.3, 27.5]),
}

# Lithium carbonate: solubility falls with temperature (retrograde). Same table, same caveat.
CRC_AQUEOUS_SOLUBILITY_RETROGRADE = {
    "Li2CO3": (73.89, [1.52, 1.41, 1.31, 1.27, 1.24, 1.16, 1.07, 0.99, 0.91, 0.84, 0.78, 0.72]),
}
