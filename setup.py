"""Build of the compiled kernels (the project's metadata is in pyproject.toml)."""
from Cython.Build import cythonize
from setuptools import Extension, setup

# -ffp-contract=off: no fused multiply-add, so every product and sum rounds as numpy's do
setup(ext_modules=cythonize(
    [Extension("clearaudit.classify._neighbours", ["clearaudit/classify/_neighbours.pyx"],
               extra_compile_args=["-O3", "-ffp-contract=off"])],
    compiler_directives={"language_level": 3}))
