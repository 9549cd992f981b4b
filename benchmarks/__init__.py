"""Benchmarks; importable so tests can reuse their data helpers."""
