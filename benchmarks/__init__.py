"""Speed and memory benchmarks (make bench); not part of the installed package."""
