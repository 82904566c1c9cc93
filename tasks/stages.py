"""Every stage task, importable from one place.

``Reduce`` chain: Inventory -> CalibrateChunk (one per chunk) -> Calibrate ->
ExtractReference -> ExtractChunk (one per chunk) -> Extract -> Bin -> Detrend.
"""

from .calibrate import Calibrate, CalibrateChunk, Inventory
from .detrend import Detrend
from .extract import Extract, ExtractChunk, ExtractReference
from .lightcurves import Bin

__all__ = ["Inventory", "CalibrateChunk", "Calibrate", "ExtractReference", "ExtractChunk",
           "Extract", "Bin", "Detrend"]
