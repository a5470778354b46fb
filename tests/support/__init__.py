"""Test support: real servers and peers that several test folders and benchmarks share."""
