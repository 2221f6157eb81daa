"""Planning (moerun.plan, in jobs): the search over splits, policies and prefetch, the time model it predicts with, and the measured costs it is calibrated on. Offline."""

__all__ = ["calibration", "jobs", "search", "timeline"]
