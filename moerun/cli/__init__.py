"""The command line: argument parsing and shared options (main), one module per command (commands), output for people (report, summary, plot). Nothing else imports it."""

__all__ = ["main", "plot", "report", "summary", "commands"]
