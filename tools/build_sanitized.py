"""Build a copy of the seamscan package whose C extension runs under
AddressSanitizer and UndefinedBehaviorSanitizer.

    python tools/build_sanitized.py OUTDIR

Copies ``src/seamscan`` to ``OUTDIR/seamscan`` and compiles the extension
(the device runtime and ``csrc/host/``, as ``_ffibuild.py`` lists them) into
it with ``-fsanitize=address,undefined``.  Use it with the sanitizer
runtimes preloaded, e.g.::

    ASAN_OPTIONS=detect_leaks=0 \\
    LD_PRELOAD="$(gcc -print-file-name=libasan.so) $(gcc -print-file-name=libubsan.so)" \\
    PYTHONPATH=OUTDIR python -c 'import seamscan; ...'

(Python itself is not built with the sanitizers, so leak reports are off.)
Used by ``tests/test_fastpath.py`` to run the replay's fast lane, which
only the host extension holds, under the sanitizers.
"""

from __future__ import annotations

import importlib.util
import shutil
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SANITIZE = ["-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-fno-omit-frame-pointer",
            "-g", "-O1"]


def build(out: Path) -> Path:
    """The package under ``out/seamscan``, its extension sanitized; that path."""
    pkg = out / "seamscan"
    shutil.rmtree(pkg, ignore_errors=True)
    shutil.copytree(ROOT / "src" / "seamscan", pkg,
                    ignore=shutil.ignore_patterns("*.so", "__pycache__"))
    spec = importlib.util.spec_from_file_location("_ffibuild", ROOT / "src/seamscan/_ffibuild.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    builder = module.ffibuilder
    kwargs = builder._assigned_source[3]  # set_source's keyword arguments
    kwargs["extra_compile_args"] = [*kwargs.get("extra_compile_args", []), *SANITIZE]
    kwargs["extra_link_args"] = [*kwargs.get("extra_link_args", []), *SANITIZE[:2]]
    # listed relative to the repository; the build runs in its own folder
    kwargs["sources"] = [str(ROOT / src) for src in kwargs["sources"]]
    kwargs["include_dirs"] = [str(ROOT / inc) for inc in kwargs["include_dirs"]]
    work = out / "build"
    work.mkdir(parents=True, exist_ok=True)
    built = Path(builder.compile(tmpdir=str(work)))
    shutil.copy2(built, pkg / built.name)
    return pkg


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    print(build(Path(sys.argv[1]).resolve()))
