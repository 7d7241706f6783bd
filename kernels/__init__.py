"""Compiled relaxation kernels (numba). Arrays and scalars in, arrays out; no UI, no files.

Installed as ``relaxtui.kernels``; nothing here imports from the rest of relaxtui.
"""

# numba starts here, before any kernel module imports it: kernels/_jit.py sets its threading
# options and keeps scipy out of its start-up.
from . import _jit  # noqa: E402,F401
