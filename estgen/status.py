"""Status codes shared by the generated C and the reference filters.

The values are part of the interface: the C header's enum uses the same numbers for every
filter, so firmware can handle them the same way whichever filter it runs.
"""

from __future__ import annotations

from enum import IntEnum


class Status(IntEnum):
    """What a call to predict, update or set_state returned. Non-zero means refused and the
    filter is exactly as it was before the call."""

    OK = 0
    #: an argument (u, z, dt, x or P) held NaN or infinity
    BAD_INPUT = 1
    #: dt was zero or negative
    BAD_DT = 2
    #: the innovation covariance, or P given to set_state, is not positive definite
    NOT_POSITIVE_DEFINITE = 3
    #: an intermediate result was not finite (overflow, or a model function out of its domain)
    NON_FINITE = 4
    #: the innovation fell outside the sensor's chi-square gate
    GATED = 5
    #: particle filter: no particle has a finite weight after the update (every one dropped)
    DEGENERATE = 6


#: codes only some filter kinds return (a kind lists its own in FilterKind.statuses); every
#: other code is in every header
KIND_STATUSES = frozenset({Status.DEGENERATE})

#: what each code asks the caller to do (used in the header's usage block and the README)
ADVICE = {
    Status.OK: "accepted",
    Status.BAD_INPUT: "a NaN or infinity was passed in; check the driver that produced it",
    Status.BAD_DT: "dt <= 0; check the timer, then call predict with the real elapsed time",
    Status.NOT_POSITIVE_DEFINITE: "covariance lost positive definiteness; if it persists, reset with set_state",
    Status.NON_FINITE: "the model produced a non-finite value here; reset with set_state if it persists",
    Status.GATED: "measurement rejected as an outlier by the chi-square gate; nothing to do unless it persists",
    Status.DEGENERATE: "no particle explains the measurement (all weights zero); reset with set_state if it persists",
}

#: Which code a call returns when several apply: the checks run in this order and the first
#: failing one returns (stated in every generated header).
PRECEDENCE = (
    "When several apply, the first check in call order wins: BAD_INPUT (arguments), BAD_DT",
    "(predict), then NON_FINITE / NOT_POSITIVE_DEFINITE of the innovation covariance, then GATED",
    "(the gate is evaluated as soon as the NIS is formed, before the new x and P), then",
    "NON_FINITE / NOT_POSITIVE_DEFINITE of the new x and P.",
)
