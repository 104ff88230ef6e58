"""atomq's benchmark suite: every benchmark of the overhead budget, run by bench/run.py.

Benchmarks measure and report; nothing here asserts a time.
"""
