"""Compiled relaxation kernels (numba). Arrays and scalars in, arrays out; no UI, no files.

Installed as ``relaxtui.kernels``; nothing here imports from the rest of relaxtui.
"""
