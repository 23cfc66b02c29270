"""In-tree PEP 517 backend: setuptools, plus the cffi extension module.

cffi's ``cffi_modules`` is a ``setup()`` keyword that pyproject.toml cannot
carry, and the repository keeps no setup.py at its top level.  This backend is
setuptools' own, with the ``setup()`` call it runs given that one keyword.
"""

from setuptools import build_meta as _meta

_SETUP = (
    "from setuptools import setup\n"
    "setup(cffi_modules=['src/seamscan/_ffibuild.py:ffibuilder'])\n"
)


class _Backend(_meta._BuildMetaBackend):
    def run_setup(self, setup_script="setup.py"):
        __file__ = setup_script  # noqa: F841  (setuptools reads it)
        __name__ = "__main__"  # noqa: F841
        exec(compile(_SETUP, setup_script, "exec"), locals())


_backend = _Backend()
get_requires_for_build_wheel = _backend.get_requires_for_build_wheel
get_requires_for_build_sdist = _backend.get_requires_for_build_sdist
get_requires_for_build_editable = _backend.get_requires_for_build_editable
prepare_metadata_for_build_wheel = _backend.prepare_metadata_for_build_wheel
prepare_metadata_for_build_editable = _backend.prepare_metadata_for_build_editable
build_wheel = _backend.build_wheel
build_sdist = _backend.build_sdist
build_editable = _backend.build_editable
