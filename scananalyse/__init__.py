"""scananalyse: storage-tank floor scan analysis.

Registration of two inspections' thickness maps, top-side vs underside loss,
corrosion-rate maps, extreme-value pit statistics, remaining life, patch-plate
repairs and inspection intervals per floor zone.

Results are decision support. The applicable standard in force, the owner's
authorised inspector and local regulations decide intervals and repairs.
"""

__version__ = "0.1.0"

CAUTION = (
    "Decision support only: the applicable standard in force, the owner's authorised "
    "inspector and local regulations decide inspection intervals and repairs. Rule values "
    "marked 'memory' must be checked against the edition in force."
)

from .scan import FloorScan, ScanMeta  # noqa: E402

__all__ = ["FloorScan", "ScanMeta", "CAUTION", "__version__"]
