"""Pot: a potentiometer, a resistive track between two ends with a wiper.

``position`` 0 puts the wiper at ``ends[0]``, 1 at ``ends[1]``. The fraction of the
track between ``ends[0]`` and the wiper follows the taper:

- ``lin``: fraction = position;
- ``log`` (audio taper): fraction = (A^p - 1) / (A - 1) with A = 81, which gives 10 %
  at mid travel (common practice: audio-taper pots are specified at 10 % at half
  rotation);
- ``reverse-log``: the mirror image, 1 - log_fraction(1 - p).

Each end keeps a residual resistance of ``end_fraction`` of the track (a real pot never
reaches zero ohms). The position is read at every evaluation, so it can move during a
render.
"""

from __future__ import annotations

from blocks._stamps import conductance
from blocks._base import Kind, Param, column, stamp_jit

TAPERS = ("lin", "log", "reverse-log")

#: Base of the audio taper: (A^0.5 - 1)/(A - 1) = 1/(sqrt(A) + 1) = 0.1 gives A = 81.
LOG_TAPER_BASE = 81.0

PARAMS = (
    Param("value", "ohm", None, "given by the patch", "track resistance", positive=True,
          tolerance_pct=20.0),
    Param("position", "", 0.5, "common practice: a knob starts at mid travel",
          "wiper position 0..1", minimum=0.0, maximum=1.0),
    Param("taper", "", "lin", "common practice: linear unless marked", "track law",
          choices=TAPERS),
    Param("end_fraction", "", 0.005,
          "common practice: carbon pots keep about 0.5 % of the track at each end",
          "residual resistance at each end, as a fraction of the track",
          minimum=1e-6, maximum=0.1),
)

C_VALUE, C_POS, C_TAPER, C_END = (column(PARAMS, n) for n in ("value", "position", "taper", "end_fraction"))


@stamp_jit
def log_fraction(p):
    return (LOG_TAPER_BASE ** p - 1.0) / (LOG_TAPER_BASE - 1.0)


@stamp_jit
def track_fraction(position, taper):
    """Fraction of the track between ends[0] and the wiper for ``taper`` code (index in TAPERS)."""
    p = min(1.0, max(0.0, position))
    if taper == 1.0:
        return log_fraction(p)
    if taper == 2.0:
        return 1.0 - log_fraction(1.0 - p)
    return p


@stamp_jit
def stamp(x, t, P, N, D, f, G):
    for k in range(P.shape[0]):
        a, b, w = N[k, 0], N[k, 1], N[k, 2]
        total = P[k, C_VALUE]
        end = P[k, C_END]
        frac = end + (1.0 - 2.0 * end) * track_fraction(P[k, C_POS], P[k, C_TAPER])
        conductance(f, G, x, a, w, 1.0 / (total * frac))
        conductance(f, G, x, w, b, 1.0 / (total * (1.0 - frac)))


KIND = Kind(
    name="pot",
    description="A potentiometer: track between ends[0] and ends[1], wiper on its own net.",
    terminals=(("ends", 2), ("wiper", 1)),
    params=PARAMS,
    stamp=stamp,
    main_param="value",
)
