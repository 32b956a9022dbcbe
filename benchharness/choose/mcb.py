"""Multiple comparisons with the best, as `choose` uses them.

The statistics live in `benchharness.analysis.mcb` (Hsu 1984; Dunnett 1955's
one-sided many-to-one critical values), so that `analyze`'s tied set and
`choose`'s are drawn by one method and cannot word one tie two ways.
"""

from benchharness.analysis.mcb import (MCBResult, dunnett_critical, many_to_one_cdf,
                                       many_to_one_critical, mcb, tie_confidence)

__all__ = ["many_to_one_cdf", "many_to_one_critical", "dunnett_critical", "MCBResult", "mcb",
           "tie_confidence"]
