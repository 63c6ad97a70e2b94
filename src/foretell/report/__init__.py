"""The self-contained HTML report, built from results in memory or read from a folder."""
