"""regimewise: learn, evaluate and stress-test dynamic treatment regimes from routine-care records.

Research use only. Nothing this package computes is medical advice; treatment decisions stay
with licensed clinicians, under local law and with ethics approval.
"""

__version__ = "0.1.0"
