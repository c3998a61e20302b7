"""Build the Cython kernels of mcexact (metadata lives in pyproject.toml)."""

import numpy as np
from Cython.Build import cythonize
from setuptools import Extension, setup

COMPILE_ARGS = ["-O3"]

extensions = [
    Extension(
        "mcexact._network",
        ["mcexact/_network.pyx"],
        include_dirs=[np.get_include()],
        extra_compile_args=COMPILE_ARGS,
        define_macros=[("NPY_NO_DEPRECATED_API", "NPY_1_7_API_VERSION")],
    ),
    Extension(
        "mcexact._sampler",
        ["mcexact/_sampler.pyx"],
        include_dirs=[np.get_include()],
        extra_compile_args=COMPILE_ARGS,
        define_macros=[("NPY_NO_DEPRECATED_API", "NPY_1_7_API_VERSION")],
    ),
]

setup(
    ext_modules=cythonize(
        extensions,
        compiler_directives={"language_level": "3"},
    ),
)
