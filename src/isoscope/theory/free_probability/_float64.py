"""The float64 limits the log-form results are measured against.

The theory carries moments and densities in logarithms (``ln m_k``, ``ln lambda``, ``rho_log``):
tanh at sigma_w = 0.3 and depth 1000 has ``ln m1 = -2430``.  A quantity is also given in
lambda-form only where its logarithm lies in the normal IEEE 754 binary64 range
``[_LOG_TINY, _LOG_HUGE] = [ln 2^-1022, ln((2 - 2^-52) 2^1023)] = [-708.40, 709.78]``; ``_EPS``
(2^-52) sets the rounding floors of the master equation (docs/theory-free-probability.md).
"""

from __future__ import annotations

import math

import numpy as np

_EPS = float(np.finfo(float).eps)
_LOG_TINY = math.log(float(np.finfo(float).tiny))  # ln of the smallest normal float64, -708.4
_LOG_HUGE = math.log(float(np.finfo(float).max))  # 709.78
