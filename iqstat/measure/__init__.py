"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory."""

from iqstat.measure.pipeline import measure_burst, measure_capture, measure_file

__all__ = ["measure_burst", "measure_capture", "measure_file"]
