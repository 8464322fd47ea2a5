"""The set of served versions and the registry access behind it (startup load, hot swap, pins)."""
