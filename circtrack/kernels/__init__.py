"""Numerical kernels: numpy only, vectorised over leading axes, NaN instead of exceptions.

Every kernel takes arrays shaped ``(..., N)`` whose last axis is a coordinate (latitude or
pressure) given as a 1-D array of length N, and returns arrays shaped ``(...)``.
"""
