"""The limits and defaults every layer shares: one place, imported by the planner, the policies,
the HTTP schemas, the settings and the command line, so no two layers disagree.

A limit is what a request may ask; a default is what it gets when it asks nothing. Values with a
unit carry it in their name.
"""

from __future__ import annotations

#: Longest wall-clock deadline a search accepts (one minute: the service answers requests
#: inside a larger one; longer work runs to proven optimality without a deadline).
MAX_DEADLINE_MS = 60_000.0

#: Largest expansion budget (a contract for reproducible runs and training).
MAX_BUDGET_EXPANSIONS = 10**12

#: Decision steps a contract may be cut into, and the default.
MAX_STEPS = 10_000
DEFAULT_STEPS = 20

#: The weight set every discrete controller moves on (the usual baseline set for weighted A*).
WEIGHTS: tuple[float, ...] = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0)

#: Range of a search weight, for ``fixed:W`` and for what any controller may return.
MIN_WEIGHT = WEIGHTS[0]
MAX_WEIGHT = WEIGHTS[-1]

#: Controller specs, as a request or a command line names them (``W`` a weight in range).
CONTROLLER_SPECS = ("learned", "decreasing", "ana", "random", "fixed:W")

#: The controller a request gets when it names none (the command line, the HTTP API and the
#: settings all use this one): the best over the served range (deadlines 2-50 ms x 1, 2, 4
#: searches per core) in ``dueroute evaluate --served`` (policies/default.md). Plain A*; the
#: shipped policy ties with it, because at these deadlines the service can afford it almost
#: no decision (one costs ~250 us between search steps), so it runs the same search.
DEFAULT_CONTROLLER = "fixed:1"

#: Controller used for ``learned`` when no policy is active.
FALLBACK_CONTROLLER = "decreasing"

#: A point farther than this from every road is refused (metres).
DEFAULT_SNAP_MAX_M = 500.0

#: ALT landmarks built beside a graph by default, and the most allowed.
DEFAULT_LANDMARKS = 16
MAX_LANDMARKS = 64


def controller_spec_help() -> str:
    """One line naming every controller spec and the weight range (for help texts and errors)."""
    return (
        f"{', '.join(CONTROLLER_SPECS)} with W a number in {MIN_WEIGHT:g}..{MAX_WEIGHT:g} "
        f"(default {DEFAULT_CONTROLLER})"
    )
