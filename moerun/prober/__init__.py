"""Probing (moerun.probe, in jobs): page-in latency and bandwidth on the user's storage, and the saved probe file the planner reads. Offline."""

__all__ = ["jobs", "pagein", "saved"]
