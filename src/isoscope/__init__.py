"""isoscope: Jacobian spectra of deep networks at initialization.

Importing isoscope turns on JAX's float64 mode (``jax_enable_x64``): analyses run in float64
by default and cast to float32 only when a spec asks for it.  It also applies the thread
policy of :mod:`isoscope.threads` to XLA, which has to happen before JAX starts.
"""

import signal as _signal
import threading as _threading

from isoscope import threads as _threads  # noqa: E402

_threads.configure_xla()


def _import_jax():
    """``import jax`` with SIGINT held back until the import is complete, then re-raised.

    A KeyboardInterrupt raised inside jaxlib's import leaves its native state half-built and the
    interpreter aborts (SIGABRT) on the way out; held back, Ctrl-C during ``import isoscope``
    raises an ordinary KeyboardInterrupt right after the import.
    """
    if _threading.current_thread() is not _threading.main_thread():
        import jax

        return jax
    pending = []
    previous = _signal.signal(_signal.SIGINT, lambda signum, frame: pending.append(signum))
    try:
        import jax
    finally:
        _signal.signal(_signal.SIGINT, previous)
    if pending and previous is not _signal.SIG_IGN:
        raise KeyboardInterrupt
    return jax


_jax = _import_jax()
_jax.config.update("jax_enable_x64", True)

from isoscope.activations import Activation, activation_names, get_activation  # noqa: E402
from isoscope.errors import (  # noqa: E402
    FiniteWidthWarning,
    InputError,
    IsoscopeWarning,
    NumericalFaultWarning,
    TheoryError,
)

__version__ = "0.1.0"

__all__ = [
    "Activation",
    "activation_names",
    "get_activation",
    "InputError",
    "TheoryError",
    "IsoscopeWarning",
    "FiniteWidthWarning",
    "NumericalFaultWarning",
    "__version__",
]
