"""Performance benchmark (`make bench`): a scaled fictional survey and the contenders timed on it.

Not part of `make test`: no file here is named test_*.py, so pytest does not collect it.
"""
