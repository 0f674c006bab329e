"""rawproof benchmarks: `python -m bench` (performance) and accuracy scripts."""
