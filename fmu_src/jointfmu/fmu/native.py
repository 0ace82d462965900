"""jointfmu's own FMI 2.0 binary: ``native/fmi2_shell.c`` compiled at build time.

By default (``binary="auto"``) the FMU carries this binary, compiled with ``$CC`` (or ``cc``)
against this Python's headers: it answers fmi2SetReal of inputs and fmi2GetReal of outputs from
the simulator's buffers without calling Python, and forwards every other call to the slave as
pythonfmu's binary does.  Where it cannot be compiled (no compiler, no Python headers, not Linux
or macOS, a compile error) the FMU keeps pythonfmu's binary and the build info records why;
``binary="native"`` makes that a :class:`BuildError`, ``binary="pythonfmu"`` always keeps
pythonfmu's binary.  The environment variable ``JOINTFMU_FMU_BINARY`` sets the default.
"""
from __future__ import annotations

import os
import platform
import shlex
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

from ..errors import BuildError

__all__ = [
    "SHELL_SOURCE",
    "BINARY_CHOICES",
    "BINARY_ENV",
    "binary_choice",
    "platform_folder",
    "compile_shell",
    "replace_binary",
]

SHELL_SOURCE = Path(__file__).resolve().parent / "native" / "fmi2_shell.c"
#: Allowed values of build_fmu(binary=...) (and of JOINTFMU_FMU_BINARY).
BINARY_CHOICES = ("auto", "native", "pythonfmu")
BINARY_ENV = "JOINTFMU_FMU_BINARY"


# ------------------------------------------------------------------------- the native binary
def binary_choice(binary: str | None) -> str:
    """``binary`` checked, or the default: ``$JOINTFMU_FMU_BINARY``, else ``"auto"``."""
    source = "binary"
    if binary is None:
        binary, source = os.environ.get(BINARY_ENV) or "auto", f"${BINARY_ENV}"
    if binary not in BINARY_CHOICES:
        raise BuildError(f"{source} = {binary!r} is not a binary choice: allowed are "
                         + ", ".join(repr(c) for c in BINARY_CHOICES))
    return binary


def platform_folder() -> str | None:
    """The FMI 2.0 binaries folder of this machine (sec. 2.3) where the shell can be built."""
    system = platform.system()
    if sys.maxsize <= 2 ** 32 or system not in ("Linux", "Darwin"):
        return None
    return {"Linux": "linux64", "Darwin": "darwin64"}[system]


def compile_shell(folder: Path, ident: str) -> tuple[Path | None, str]:
    """Compile :data:`SHELL_SOURCE` into ``folder/<ident>.<ext>``.

    Returns (the library, "") or (None, why it could not be compiled).  The library links no
    libpython: the Python C API comes from the host process, as with pythonfmu's binary.
    """
    plat = platform_folder()
    if plat is None:
        return None, (f"the native binary is built on 64-bit Linux and macOS only (this is "
                      f"{platform.system()} {platform.machine()})")
    if not SHELL_SOURCE.is_file():
        return None, f"its source {SHELL_SOURCE} is missing"
    include = sysconfig.get_paths().get("include")
    if not include or not (Path(include) / "Python.h").is_file():
        return None, f"no Python headers (Python.h) in {include!r}"
    cc = shlex.split(os.environ.get("CC") or "cc")
    if not cc or shutil.which(cc[0]) is None:
        return None, (f"no C compiler: {cc[0] if cc else '$CC'!r} not found (set $CC or "
                      "install cc)")
    ext = "dylib" if plat == "darwin64" else "so"
    out = folder / f"{ident}.{ext}"
    cmd = cc + ["-shared", "-fPIC", "-O2", "-fvisibility=hidden", f"-I{include}", "-o", str(out),
                str(SHELL_SOURCE)]
    if plat == "darwin64":
        cmd[-2:-2] = ["-undefined", "dynamic_lookup"]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    except (OSError, subprocess.SubprocessError) as exc:
        return None, f"{' '.join(cmd[:1])} failed to run: {exc}"
    if proc.returncode != 0 or not out.is_file():
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-5:]
        return None, (f"compiling {SHELL_SOURCE.name} with {' '.join(cc)} failed (exit "
                      f"{proc.returncode}): " + " | ".join(tail))
    return out, ""


def replace_binary(zip_in: zipfile.ZipFile, item: zipfile.ZipInfo,
                    native: Path | None) -> bytes:
    """The bytes of archive member ``item``: the native library (named after the model
    identifier, as pythonfmu's binary is) in place of pythonfmu's binary for this platform,
    every other member unchanged."""
    if native is not None and item.filename == f"binaries/{platform_folder()}/{native.name}":
        return native.read_bytes()
    return zip_in.read(item.filename)


