"""Speed and scale benchmarks of loopledger (``python benchmarks/run.py``); they print figures
and ratios and never assert on time."""

__all__: list[str] = []
