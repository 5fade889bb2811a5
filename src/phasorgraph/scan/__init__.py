"""The charge scan: does edge direction help, and at which charge? (``python -m phasorgraph.scan`` runs it on tables.)"""

from .charges import DEFAULT_CHARGES, ChargeRow, ChargeScan, magnetic_chebyshev_terms, randomize_orientation, scan_charges

__all__ = ["scan_charges", "ChargeScan", "ChargeRow", "magnetic_chebyshev_terms", "randomize_orientation",
           "DEFAULT_CHARGES"]
