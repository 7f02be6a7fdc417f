"""isoscope: Jacobian spectra of deep networks at initialization.

Importing isoscope turns on JAX's float64 mode (``jax_enable_x64``): analyses run in float64
by default and cast to float32 only when a spec asks for it.  It also applies the thread
policy of :mod:`isoscope.threads` to XLA, which has to happen before JAX starts.
"""

from isoscope import threads as _threads

_threads.configure_xla()

import jax as _jax  # noqa: E402

_jax.config.update("jax_enable_x64", True)

from isoscope.activations import Activation, activation_names, get_activation  # noqa: E402
from isoscope.errors import (  # noqa: E402
    FiniteWidthWarning, InputError, IsoscopeWarning, NumericalFaultWarning, TheoryError)

__version__ = "0.1.0"

__all__ = [
    "Activation", "activation_names", "get_activation",
    "InputError", "TheoryError", "IsoscopeWarning", "FiniteWidthWarning", "NumericalFaultWarning",
    "__version__",
]
