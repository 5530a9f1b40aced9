"""Pure statistics over arrays: test statistics, checks, comparison, effects."""
