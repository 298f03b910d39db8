"""Build the optional compiled loops (tickscope/core/_kernels.c); everything else is in pyproject.toml.

``optional=True``: where no C compiler is available the install goes on without the module and
tickscope uses the numpy versions of the same loops (tickscope/core/kernels.py).
"""
import os

from setuptools import Extension, setup

setup(ext_modules=[Extension("tickscope.core._kernels", ["tickscope/core/_kernels.c"], optional=True,
                             extra_compile_args=[] if os.name == "nt" else ["-O3"])])
