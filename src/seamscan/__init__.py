"""seamscan: exact multi-signature matching across packet boundaries.

The public names are imported lazily so that ``seamscan --help`` and the
pure-Python modules start fast and work before the C extension is built.
"""

__version__ = "0.1.0"

_LAZY = {
    "load_signatures": "seamscan.signatures",
    "loads_signatures": "seamscan.signatures",
    "signature_set": "seamscan.signatures",
    "Signature": "seamscan.signatures",
    "SignatureSet": "seamscan.signatures",
    "SignatureError": "seamscan.signatures",
    "compile": "seamscan.engine",
    "Table": "seamscan.engine",
    "Stream": "seamscan.engine",
    "Match": "seamscan.engine",
    "TableError": "seamscan.image",
    "CompileError": "seamscan.compiler",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'seamscan' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value
