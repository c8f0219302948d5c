"""Virtual species: simulated truth, simulated surveys, fits, scores (``python -m bench --only recovery``).

The suite follows the virtual-ecologist approach (Zurell, Berger, Cabral, Jeltsch, Meynard,
Münkemüller, Nehrbass, Pagel, Reineking, Schröder & Grimm 2010, "The virtual ecologist
approach: simulating data and observers", Ecography 33:607-617): the truth is simulated, an
observer samples it the way real surveys do, the method under test sees only the observer's
data, and its answer is scored against the truth it never saw.

- ``landscape.py``: a square landscape of 1 km cells with spatially structured factor fields
  (gradients plus smoothed noise), pairs of factors correlated to a chosen degree, and a future
  that shifts the factors, decouples some correlated pairs and pushes part of the grid beyond
  the survey's range.
- ``truth.py``: true per-factor ceiling curves of several shapes (hump, saturating, declining,
  plateau with a threshold, a limit that bites only at one end of the range, and none at all),
  combined by the law of the minimum.
- ``survey.py``: survey designs (uniform, tens of tight clusters, biased toward one end of a
  gradient) and abundance far below the ceiling (a skewed beta fraction, zero inflation, and
  Poisson or negative-binomial counts, or continuous values).
- ``scenarios.py``: the families of scenarios, each run over several seeds.
- ``score.py``: scores against the truth (rank correlation of the ceiling now and later, the
  limiting factor where the truth names it clearly, the sign of large changes, calibration on
  held-out spatial blocks).
- ``suite.py``: the candidates (fitting settings), the runs, the table.

Everything is generated here from fixed seeds; the landscapes, species and surveys are
invented and stand for no real place or species.
"""
