"""The run's own verdict on its map: sound, or doubtful with the reasons, without ground truth.

Every verified closure passed statistical tests, and a map can still be
wrong: a whole family of look-alike closures can agree with itself, and an
odometry model the tool could not measure can make any of them look
plausible.  The run therefore checks what it can check about the result as
a whole, each from evidence in the log itself:

* the odometry model was measured against the scans (calibration);
* the verified closures agree with that model: its variance factor is
  near one, and no heading drift is left that the closures see but the
  calibration did not (the closures are held-out evidence);
* the consistent set of closures is proven maximum;
* after optimisation, no two visits of one place contradict each other
  (a wall of one inside the free space of the other, see
  :mod:`closurecheck.verification.free_space`).

A run that fails any of them is *doubtful*: its outputs are written and
marked, the report opens with the reasons, and the command exits with its
own status (docs/cli.md) so that a batch job can stop on it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core.options import options, setting

# The largest odometry variance factor (median odometry chi-square of the
# verified closures over the chi-square(3) median) that we still call
# plausible: a rule of our own, not a published bound.  One home for the
# trust verdict and for the clique choice of the verification stage
# (``VerifyOptions.clique_max_odometry_factor``).
PLAUSIBLE_ODOMETRY_FACTOR = 4.0


@options
class TrustOptions:
    """Bounds of a sound run.

    max_odometry_scale : the closures may find the odometry's covariance too
        small by at most this factor (a posteriori variance factor); beyond
        it the model the gates used is contradicted by the evidence.
    max_drift_sigmas : a heading drift the verified closures still measure
        after calibration must be within this many standard errors of zero.
    max_contradictions : keyframe pairs whose scans may still contradict
        each other after optimisation.
    """

    max_odometry_scale: float = setting(PLAUSIBLE_ODOMETRY_FACTOR, at_least=1.0)
    max_drift_sigmas: float = setting(4.0, above=0.0)
    max_contradictions: int = setting(0, at_least=0)


@dataclass(frozen=True)
class TrustVerdict:
    """``sound`` or not, with a sentence for each reason for doubt."""

    sound: bool
    reasons: tuple = ()

    @property
    def label(self) -> str:
        return "sound" if self.sound else "doubtful"


def judge(*, calibrated: bool, odometry_scale: float, drift_rate: float, drift_std: float, drift_closures: int,
          clique_exact: bool, contradictions: int, accepted: int,
          options: TrustOptions = TrustOptions()) -> TrustVerdict:
    """The trust verdict from the run's figures (see the module docstring).

    Parameters
    ----------
    calibrated : the odometry was measured against the scans.
    odometry_scale : the a posteriori variance factor of the odometry model.
    drift_rate, drift_std, drift_closures : the heading drift (rad/m) the
        verified closures measure on the calibrated odometry, its standard
        error and the number of closures behind it.
    clique_exact : the maximum consistent set was proven maximum.
    contradictions : keyframe pairs whose scans still contradict.
    accepted : verified closures.

    Examples
    --------
    >>> from closurecheck.verification.trust import judge
    >>> judge(calibrated=True, odometry_scale=1.2, drift_rate=0.0, drift_std=1e-4, drift_closures=50,
    ...       clique_exact=True, contradictions=0, accepted=50).label
    'sound'
    >>> v = judge(calibrated=True, odometry_scale=1.2, drift_rate=0.0, drift_std=1e-4, drift_closures=50,
    ...           clique_exact=True, contradictions=3, accepted=50)
    >>> v.label, v.reasons[0][:38]
    ('doubtful', 'the scans of 3 pairs of keyframes from')
    """
    reasons = []
    if not calibrated and accepted:
        reasons.append("the odometry could not be measured against its own scans, so the noise model behind every "
                       "gate is the log header's or the default, unchecked")
    if odometry_scale > options.max_odometry_scale:
        reasons.append(f"the verified closures find the odometry {odometry_scale:.1f} times noisier than its "
                       f"measured model (at most {options.max_odometry_scale:g} is plausible): the closures or the "
                       f"model are wrong")
    if drift_closures and drift_std > 0 and abs(drift_rate) > options.max_drift_sigmas * drift_std:
        reasons.append(f"the verified closures still see a heading drift of {np.degrees(drift_rate) * 100:.2f} deg per "
                       f"100 m ({abs(drift_rate) / drift_std:.1f} standard errors) that the calibration did not")
    if not clique_exact:
        reasons.append("the largest consistent set of closures is not proven to be the largest (search budget)")
    if contradictions > options.max_contradictions:
        reasons.append(f"the scans of {contradictions} pairs of keyframes from different visits contradict each "
                       f"other in the optimised map (a wall of one inside the free space of the other)")
    return TrustVerdict(sound=not reasons, reasons=tuple(reasons))
