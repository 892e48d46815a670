"""Build of the compiled CPU kernel (kalmax/_src/cpu) — metadata lives in pyproject.toml.

The kernel is a plain C++ shared library with XLA FFI handlers; it uses no
Python C API. It is built as a setuptools extension only so that
``pip install .`` compiles it and puts it in ``kalmax/_src``, where ``kalmax/_src/backends/cpu.py``
loads it with ctypes and registers its handlers with ``jax.ffi``.

XLA FFI headers: we compile against the copies in ``kalmax/_src/cpu/include``,
taken unchanged from jaxlib 0.10.2, the oldest jaxlib that pyproject.toml
allows. Why vendored rather than ``jax.ffi.include_dir()`` at build time: a
handler built against headers *newer* than the running jaxlib's FFI API is
refused at registration, and pip's isolated build environment would install
whatever jaxlib is newest rather than the one the package will run with. XLA
keeps accepting handlers built against older FFI API versions, so headers of
the oldest supported jaxlib work with every jaxlib the package allows, with or
without build isolation, and without jax in the build environment.
Set KALMAX_FFI_INCLUDE to another include directory to override (e.g. the
output of ``python -c "import jax; print(jax.ffi.include_dir())"``).

Flags: portable -O3 by default (no -march=native, so wheels run on any x86-64
or aarch64 of their platform); set KALMAX_NATIVE=1 to add -march=native for a
build tuned to this machine. Set KALMAX_NO_KERNEL=1 to skip the kernel
entirely (kalmax then uses its pure-JAX path).
"""

import os

from setuptools import Extension, setup

HERE = os.path.dirname(os.path.abspath(__file__))
CPU_DIR = os.path.join("kalmax", "_src", "cpu")
FFI_INCLUDE = os.environ.get("KALMAX_FFI_INCLUDE") or os.path.join(CPU_DIR, "include")

compile_args = [
    "-std=c++17",
    "-O3",
    "-g0",  # no debug info: smaller library, faster build
    "-fno-math-errno",  # lets sqrt inline; NaN/Inf semantics are kept (no -ffast-math)
    "-pthread",  # vmapped batches run on several threads (kernel.cc, for_batches)
    "-isystem",
    FFI_INCLUDE,  # third-party headers: their warnings are not ours
]
if os.environ.get("KALMAX_NATIVE"):
    compile_args.append("-march=native")

extensions = []
if not os.environ.get("KALMAX_NO_KERNEL"):
    extensions.append(
        Extension(
            "kalmax._src._cpu_kernel",
            sources=[os.path.join(CPU_DIR, "kernel.cc")],
            depends=[os.path.join(CPU_DIR, f) for f in ("dense.h", "patterns.h", "smoother.h", "likelihood.h", "band_tangent.h", "band_pullback.h", "precision_terms.h", "widen.h")],
            include_dirs=[CPU_DIR],
            extra_compile_args=compile_args,
            extra_link_args=["-pthread"],
            language="c++",
        )
    )

setup(ext_modules=extensions)
