"""Reading NIfTI and DICOM, geometry, de-identification and storage of volumes.

Django-free: takes paths and bytes, returns numpy arrays, affines and plain records.
"""
