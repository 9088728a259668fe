"""Pipeline stages: each module holds pure functions over arrays and tables."""
