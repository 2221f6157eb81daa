"""Planning (moerun.plan, in jobs): the search over splits, policies and prefetch, the time model it predicts with, and the measured costs it is calibrated on (on the model, or on one layer at its shape: shape_costs). Offline."""

__all__ = ["calibration", "jobs", "search", "shape_costs", "timeline"]
