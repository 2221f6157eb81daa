"""What a decode runs: the engine and its options (moerun.load), the budget of the cap, the expert pool and its slots, residency and its decisions, guesses and the prefetch point, the reader process, the emulated link, the clock, the memory watch and its check against the cap, the baseline expert sources."""

__all__ = ["budget", "capcheck", "clock", "engine", "guesses", "link", "memwatch", "options", "pool", "prefetch", "reader", "residency", "slots", "sources"]
