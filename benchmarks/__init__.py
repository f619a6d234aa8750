"""Speed and memory benchmarks (outside the library package)."""
