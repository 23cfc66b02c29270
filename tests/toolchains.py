"""The C toolchains some tests need, and the Debian packages that bring them.

A test that cannot find a tool skips with :func:`skip_message`, which names
the packages to install, so that a skip on a plain machine says what to do.
Package names are Debian 12's, read with ``dpkg -S`` off the files of a
machine that has the tools (``.ci/run`` installs them); a meta package is
named where Debian has one (``gcc`` brings ``gcc-12``, ``binutils`` brings
``nm``).
"""

from __future__ import annotations

import shutil

PACKAGES = {
    "make": "make",
    "cc": "gcc",
    "gcc": "gcc",
    "clang": "clang",
    "nm": "binutils",
    "gcc sanitizers": "gcc libasan8 libubsan1",  # gcc depends on both through libgcc-12-dev
    "clang sanitizers": "libclang-rt-dev",
    "libFuzzer": "clang libclang-rt-dev",  # libclang_rt.fuzzer-*.a is in libclang-rt-14-dev
    "arm-none-eabi-gcc": "gcc-arm-none-eabi",
    "arm-none-eabi-size": "binutils-arm-none-eabi",
    "arm-linux-gnueabihf-gcc": "gcc-arm-linux-gnueabihf libc6-dev-armhf-cross",
    "mips-linux-gnu-gcc": "gcc-mips-linux-gnu libc6-dev-mips-cross",
    "qemu-arm": "qemu-user",
    "qemu-mips": "qemu-user",
}


def packages(*tools: str) -> str:
    """The Debian packages for ``tools``, each once, space-separated."""
    seen: list[str] = []
    for tool in tools:
        for pkg in PACKAGES[tool].split():
            if pkg not in seen:
                seen.append(pkg)
    return " ".join(seen)


def skip_message(problem: str, *tools: str) -> str:
    """``problem`` and how to fix it: ``...; on Debian: apt-get install PKG...``."""
    return f"{problem}; on Debian: apt-get install {packages(*tools)}"


def missing(*tools: str) -> list[str]:
    """Those of ``tools`` (commands) not on PATH."""
    return [t for t in tools if shutil.which(t) is None]
