# my_detectors.py
import numpy as np
from logtrial.detectors.base import Detector, DetectorParams


class MaxCountParams(DetectorParams):
    scale: float = 1.0


class MaxCount(Detector):
    """Scores a window by its largest single event count."""

    name = "max_count"
    reads = "counts"
    trains_on = "all"
    Params = MaxCountParams

    def _fit(self, windows, labels):
        self.typical_ = float(windows.counts.max(axis=1).toarray().mean())

    def _score(self, windows):
        peak = windows.counts.max(axis=1).toarray().ravel()
        return self.params.scale * (peak - self.typical_)
