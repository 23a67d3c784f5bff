"""Build the compiled kernels (``ntrans/_kernels.pyx``); everything else is in pyproject.toml."""

import sys

from Cython.Build import cythonize
from setuptools import Extension, setup

# the kernels never read errno: without it the compiler can vectorise sqrt (GCC, Clang)
FLAGS = [] if sys.platform == "win32" else ["-fno-math-errno"]

setup(
    ext_modules=cythonize(
        [Extension("ntrans._kernels", ["ntrans/_kernels.pyx"], extra_compile_args=FLAGS)],
        compiler_directives={"language_level": 3},
    )
)
