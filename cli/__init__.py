"""Command line, terminal report, JSON output and plots for toothcomb."""
