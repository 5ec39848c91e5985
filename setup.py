"""Build of the compiled kernels (the project's metadata is in pyproject.toml)."""
from Cython.Build import cythonize
from setuptools import Extension, setup

# -ffp-contract=off: no fused multiply-add, so every product and sum rounds as numpy's do
setup(ext_modules=cythonize(
    [Extension(f"clearaudit.classify.{name}", [f"clearaudit/classify/{name}.pyx"],
               extra_compile_args=["-O3", "-ffp-contract=off"])
     for name in ("_neighbours", "_grid")]
    + [Extension("clearaudit.io._lazlayers", ["clearaudit/io/_lazlayers.pyx"],
                 extra_compile_args=["-O3"]),
       Extension("clearaudit.audit._polyline", ["clearaudit/audit/_polyline.pyx"],
                 extra_compile_args=["-O3", "-ffp-contract=off"]),
       Extension("clearaudit.model._irls", ["clearaudit/model/_irls.pyx"],
                 extra_compile_args=["-O3", "-ffp-contract=off"]),
       Extension("clearaudit.physics._catenary_residuals",
                 ["clearaudit/physics/_catenary_residuals.pyx"],
                 extra_compile_args=["-O3", "-ffp-contract=off"])],
    compiler_directives={"language_level": 3}))
