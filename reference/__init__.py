"""Hand-written reference Stan programs of concrete structures and the mapping between them and leafcv's
generic program, shared by the tests (tests/sampling/stan/test_leafcv.py, tests/cv/test_leafmodel.py) and
bench/bench_reference.py. Not part of the installed package: imported from the repository root."""
