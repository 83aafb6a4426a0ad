"""Build hook: the optional MUMPS layer (acoustic_fem/_zsym_c.c), see acoustic_fem/_zsym.py.

Everything else is declared in pyproject.toml.  The extension is built only when
sequential MUMPS is installed (Debian: ``apt-get install libmumps-seq-dev``), and
its build may fail without failing the install (``optional=True``): the damped
solver then uses its slower fallback paths.
"""

import os

from setuptools import Extension, setup

MUMPS_INCLUDE = os.environ.get("ACOUSTIC_FEM_MUMPS_INCLUDE", "/usr/include")
MUMPS_SEQ_INCLUDE = os.path.join(MUMPS_INCLUDE, "mumps_seq")

ext_modules = []
if os.path.exists(os.path.join(MUMPS_INCLUDE, "zmumps_c.h")) and not os.environ.get(
        "ACOUSTIC_FEM_NO_MUMPS"):
    ext_modules.append(Extension(
        "acoustic_fem._zsym_c",
        sources=["acoustic_fem/_zsym_c.c"],
        include_dirs=[MUMPS_SEQ_INCLUDE, MUMPS_INCLUDE],
        libraries=["zmumps_seq"],
        extra_compile_args=["-O2"],
        optional=True,
    ))

setup(ext_modules=ext_modules)
