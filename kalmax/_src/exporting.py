r"""Exporting a function that uses kalmax with ``jax.export`` (serving, other processes).

Two routes, both documented in README.md ("Export for serving"):

* Portable: pass ``method="scan"`` (pure JAX: sequential block Cholesky). It
  exports with a symbolic number of steps; declare ``T >= 2`` among the
  symbolic constraints (``jax.export.symbolic_shape("T", constraints=("T >= 2",))``),
  since the model's terms differ for one step and several. The artefact
  carries JAX's usual compatibility guarantees. (``method="parallel"`` lays
  its reduction levels out for a concrete T and does not export with a
  symbolic one.)
* Compiled kernel: ``jax.export`` refuses custom calls whose targets carry no
  compatibility guarantee, which is the kernel's case. Passing
  ``disabled_checks=kernel_export_checks()`` exports it anyway, knowingly:
  the artefact names the kernel's FFI targets (``kalmax_cpu_*``) and their
  operand layout, so it runs only in a process where the *same* kalmax build
  has registered them (``import kalmax`` does), on CPU. A different kalmax
  version may change a target's operands or attributes without notice, and
  a process without kalmax fails at load time. Use it for caching within one
  deployment, not for long-lived artefacts.

Serialising an ``Exported`` (``exported.serialize()``) needs the
``flatbuffers`` package: the optional extra ``kalmax[export]``.
"""

from __future__ import annotations

from jax import export

from .backends.cpu import FFI_TARGETS


def kernel_export_checks():
    """``disabled_checks`` for ``jax.export.export`` of code that calls the compiled kernel.

    Returns one ``DisabledSafetyCheck.custom_call`` per FFI target of the
    kernel. Read the module docstring first: the exported artefact then runs
    only where the same kalmax build is loaded.
    """
    return [export.DisabledSafetyCheck.custom_call(name) for name in FFI_TARGETS]
