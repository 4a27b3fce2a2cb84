"""crowdcore benchmarks: `python -m bench [--quick] [--json]` (see bench/README.md). Never asserted in tests."""
