"""The load tester: workload generation, probe accounting and the avoided-fan-out report.

`workload`, `stats` and `report` are pure (no I/O); `runner` talks to a fleet; `plot` draws
the optional figure with matplotlib.
"""
