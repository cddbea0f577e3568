"""Set-up objects kept out of the garbage collector's passes: the one home for it.

Python's cyclic garbage collector runs whenever allocations outnumber deallocations by a
threshold, and its older generations walk every tracked object alive. After a controller's
set-up that is tens of thousands of long-lived objects (casadi wrappers, built problems,
arrays), walked again and again during the real-time loop: measured on
benchmarks/mpc_benchmark.py's rover loop, the Python time around a real-time sample fell
from 136 to 103 us of 541 us (and the whole sample by 13 %) once they were frozen. Freezing
(`gc.freeze`, Python 3.7+: "move all the objects tracked by the garbage collector into a
permanent generation", Python documentation, gc module) is common practice for
latency-sensitive loops: set up, freeze, then run. Objects frozen are never collected, so
only what lives as long as the process should be alive when it is called: call it once the
set-up is done (a lifecycle node's on_configure), not in a loop.
"""

from __future__ import annotations

import gc


def freeze_after_setup() -> None:
    """Collect what the set-up left as garbage, then freeze every object still alive."""
    gc.collect()
    gc.freeze()
