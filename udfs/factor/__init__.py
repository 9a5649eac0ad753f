"""Numerical kernels: sampling, selection, link matrices, sketches and the SVD reference.

These are in-memory kernels on small matrices (or on a whole matrix in tests). They do no
input validation beyond what their docstrings state; the builder validates once, at the edge.
"""
