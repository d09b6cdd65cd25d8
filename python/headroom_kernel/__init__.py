"""headroom_kernel — write a headroom kernel in Python (NumPy; PyTorch on request).

A decorated function becomes an external-program kernel that speaks headroom's
.npy exchange in both modes (docs/external-program.md): see kernel(). The
pytest helper is headroom_kernel.testing.qualify.
"""
from .kernel import Kernel, kernel
from .problem import Problem, Unsupported, Weights

__all__ = ["Kernel", "Problem", "Unsupported", "Weights", "kernel"]
__version__ = "0.1.0"
