"""The run's configuration: one frozen record of every stage's options.

Built from the defaults, a TOML file and the command line.

``--config FILE`` loads a TOML file over the defaults, command-line options
go on top, and the effective configuration is written next to the outputs
so that a run can be reproduced with ``--config DIR/config.toml``
(docs/cli.md, "Settings").  Every value is checked here, when the
configuration is built, before any scan is read.
"""

from __future__ import annotations

from .calibration.odometry import CalibrationOptions
from .core.options import OptionError, fail, options, setting, updated
from .errors import InputError
from .frontend.candidates import CandidateOptions
from .frontend.descriptors import DescriptorOptions
from .frontend.keyframes import KeyframeOptions
from .io.decisions_csv import decision_rows
from .io.settings_file import load_toml
from .registration.icp import RegistrationOptions
from .verification.trust import TrustOptions
from .verification.verify import VerifyOptions


@options
class OdometryOverrides:
    """Odometry noise model settings that override the log header's.

    None keeps the value from the log's ``odometry_noise`` header key, or the
    built-in default when the log has none (docs/formats.md).
    """

    translation_m_per_sqrt_m: float | None = setting(None, at_least=0.0)
    heading_rad_per_sqrt_m: float | None = setting(None, at_least=0.0)
    heading_rad_per_sqrt_rad: float | None = setting(None, at_least=0.0)


@options
class ReviewOptions:
    """A reviewer's decisions that overrule the verifier for named pairs (docs/formats.md, "Reviewer decisions").

    decisions : rows ``[from, to, "accept" | "reject", note]``, one per
        unordered pair of scan ids; ``closurecheck run --decisions FILE.csv``
        fills them from the file, and the run's config.toml keeps a copy so
        that ``--config DIR/config.toml`` repeats the run with the same
        decisions even if the file changes or moves.
    decisions_file : the file the rows were read from (a record for people;
        the rows are what the run uses).
    """

    decisions: tuple[tuple, ...] = setting(())
    decisions_file: str = setting("")

    def __post_init__(self):
        try:
            rows = decision_rows(self.decisions, source="decisions").rows()
        except InputError as exc:
            fail("decisions", f"row {exc.line}: {exc.problem}")
        # One spelling of each row (tuples, lower-case words, one row per pair),
        # so a configuration read back from config.toml equals the one written.
        object.__setattr__(self, "decisions", rows)


@options
class RunConfig:
    """Every setting of a run; one TOML table per stage (docs/cli.md, "Settings").

    jobs : worker processes for registration (0 = all cores, 1 = serial);
        unless 1, a second process also draws most of the report's pictures
        (closurecheck.reporting.picture_worker).
    batch_pairs : candidate pairs per unit of parallel work.
    max_pairs : most candidate pairs a run registers (a pairs file and
        proposals together); more are refused with exit status 2 before
        any registration.  The default, 200,000, is about half an hour of
        registration with two workers at the 100-odd pairs per second of
        docs/performance.md ("Whole runs and parallel registration"); a
        million pairs would take hours.
    """

    jobs: int = setting(0, at_least=0)
    batch_pairs: int = setting(64, at_least=1)
    max_pairs: int = setting(200_000, at_least=1)
    keyframes: KeyframeOptions = KeyframeOptions()
    odometry: OdometryOverrides = OdometryOverrides()
    calibration: CalibrationOptions = CalibrationOptions()
    descriptors: DescriptorOptions = DescriptorOptions()
    candidates: CandidateOptions = CandidateOptions()
    # Candidates arrive with guesses good to a metre or so (odometry shrunk
    # towards "same place", descriptor yaw), so the coarse search needs a
    # smaller window than registration's own default for arbitrary pairs;
    # a third of the area costs a third of the time.  A fixed 0.01 rad
    # angle step keeps long-range scans (30 m) from multiplying the angles
    # searched; ICP refines the angle anyway.
    registration: RegistrationOptions = RegistrationOptions(coarse_window_m=2.0, coarse_window_rad=0.6,
                                                            coarse_angle_step_rad=0.01)
    verify: VerifyOptions = VerifyOptions()
    trust: TrustOptions = TrustOptions()
    review: ReviewOptions = ReviewOptions()


def build_config(config_file=None, updates: dict | None = None) -> RunConfig:
    """The run's configuration: defaults, then a TOML file, then ``updates`` (the command line).

    Parameters
    ----------
    config_file : path of a TOML settings file, or None.
    updates : nested dict ``{table: {setting: value}}`` (top-level settings
        directly), applied after the file.

    Raises InputError naming the setting (``verify.kernel``) and the file for
    any unknown setting or bad value.

    Examples
    --------
    >>> from closurecheck.config import build_config
    >>> build_config(updates={"verify": {"min_overlap": 0.4}}).verify.min_overlap
    0.4
    >>> build_config(updates={"verify": {"kernel": "nonsense"}})
    Traceback (most recent call last):
    ...
    closurecheck.errors.InputError: verify.kernel: must be one of 'l2', 'huber', 'cauchy', ...
    """
    config = RunConfig()
    if config_file is not None:
        try:
            config = updated(config, load_toml(config_file))
        except OptionError as exc:
            raise InputError(str(exc), config_file) from None
    if updates:
        try:
            config = updated(config, updates)
        except OptionError as exc:
            raise InputError(str(exc)) from None
    return config
