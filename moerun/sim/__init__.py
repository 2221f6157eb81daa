"""Replay (moerun.record and moerun.replay, in jobs): eviction and prefetch policies on recorded routing, per-layer quotas or one shared pool, with the offline optimum and the baselines. Offline: the runtime never imports it."""

__all__ = ["counts", "fast", "jobs", "prefetch", "report", "steps"]
