"""Benchmarks: side-by-side ratios against bare building blocks (run with `make bench`)."""
