"""Statistics core: agreement, consensus, repeatability, drift, detector scoring.

Django-free: takes and returns numpy arrays and pandas DataFrames.
"""
