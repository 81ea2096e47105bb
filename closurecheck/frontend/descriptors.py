"""Rotation-invariant scan descriptors and a yaw estimate between two scans.

Descriptor ("ring harmonics").  Published ideas it builds on: the polar
ring/sector split of Scan Context (Kim and Kim, IROS 2018), reduced to 2D
where a scan has no height, the ring histograms of ring-key style place
recognition, and Fourier magnitudes as shift-invariant features.  Our
design:

1. Each return (range r, bearing phi in the robot frame) is spread over
   ``rings`` concentric rings with a triangular kernel in r (centres evenly
   spaced from 0 to ``max_radius_m``; returns beyond the last centre go to
   the last ring), so a range changing by a few centimetres moves weight
   smoothly instead of jumping between rings.  Beams with no return form one
   extra ring "at infinity", which keeps open directions informative.
2. Per ring, the angular weight density is summarised by its circular
   Fourier coefficients ``h_k = sum_j w_j exp(-i k phi_j) * angle_step / 2pi``
   for ``k = 0..harmonics``, computed directly from the beam bearings
   (no sector binning).  Rotating the robot by alpha multiplies ``h_k`` by
   ``exp(-i k alpha)``, so ``|h_k|`` is invariant for *any* angle, not only
   multiples of a sector width.  ``|h_0|`` is the ring histogram.
3. The descriptor is ``sqrt(|h_k| + c) - sqrt(c)`` over rings and
   harmonics, compared with the Euclidean distance.  The square root evens
   out big and small rings, as the Hellinger distance does for histograms;
   the small offset ``c`` (``compress_offset``) stops it from magnifying
   the step from nothing to a little, which is what a few dropouts or a
   passer-by add to an otherwise empty ring.

Invariance is exact (up to beam sampling) only when the sensor covers the
full circle.  A 270-degree sensor sees a different part of the world when it
turns, so its descriptors drift with rotation; revisits within 30 degrees of
heading still share 240 degrees of view.  benchmarks/candidates.py measures
the effect.  A few beams changing (dropouts, a person walking by) move only
their own share ``angle_step / 2pi`` of weight per ring, which bounds the
change of the descriptor.

Yaw estimate.  Each scan also gets a sector signature: the mean range of the
returns in each of ``yaw_sectors`` equal sectors around the robot (NaN where
a sector has no return).  Two signatures are compared at every circular
shift by masked normalised cross-correlation computed with FFTs (only the
sectors both scans see count), and the best few local maxima, refined by a
parabola through the neighbouring shifts, are the yaw hypotheses.

Convention: for two scans A (pose a) and B (pose b) at nearby positions the
estimate is of ``dtheta = theta_b - theta_a``, the heading of the delta
``a^-1 ∘ b``, i.e. B's points rotated by dtheta line up with A's points.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..core import se2
from ..core.options import options, setting
from ..errors import InputError
from ..io.scanlog import Sensor

TWO_PI = 2.0 * math.pi


@options
class DescriptorOptions:
    """Shape of the descriptor and of the yaw signature.

    rings : number of range rings (plus one for "no return").
    max_radius_m : centre of the outermost ring (metres); returns beyond it
        count fully in that ring.
    harmonics : highest angular harmonic per ring (k = 0..harmonics).
    no_return_weight : scale of the "no return" ring in the descriptor
        (0 drops it; 1 treats it like a range ring).
    compress_offset : the c of ``sqrt(|h| + c) - sqrt(c)``.
    yaw_sectors : number of sectors of the yaw signature (360 -> 1 degree).
    yaw_min_overlap : fraction of the sectors two signatures must both see
        at a shift for that shift to be considered.
    batch_scans : scans processed per block (bounds memory, not results).
    """

    rings: int = setting(8, at_least=1)
    max_radius_m: float = setting(12.0, above=0.0)
    harmonics: int = setting(4, at_least=0)
    no_return_weight: float = setting(0.5, at_least=0.0)
    compress_offset: float = setting(0.01, at_least=0.0)
    yaw_sectors: int = setting(360, at_least=8)
    yaw_min_overlap: float = setting(0.25, above=0.0, at_most=1.0)
    batch_scans: int = setting(256, at_least=1)

    @property
    def size(self) -> int:
        """Length of one descriptor vector."""
        return (self.rings + 1) * (self.harmonics + 1)


@dataclass(frozen=True, eq=False)
class ScanDescriptors:
    """Descriptors of a set of scans.

    vectors : (K, D) float64 rotation-invariant descriptors (Euclidean metric).
    sectors : (K, S) float32 yaw signatures: mean range (metres) per sector,
        sector i covering bearings [-pi + i*2pi/S, -pi + (i+1)*2pi/S) in the
        robot frame; NaN where the sector has no return.
    """

    vectors: np.ndarray
    sectors: np.ndarray

    def __len__(self) -> int:
        return len(self.vectors)

    def take(self, rows) -> "ScanDescriptors":
        """Descriptors of a subset of rows."""
        return ScanDescriptors(self.vectors[rows], self.sectors[rows])


def _ring_weights(r: np.ndarray, options: DescriptorOptions) -> np.ndarray:
    """Triangular-kernel ring membership (..., rings) of ranges r (NaN -> all zero)."""
    rings = options.rings
    spacing = options.max_radius_m / max(rings - 1, 1)
    pos = np.clip(np.nan_to_num(r, nan=0.0) / spacing, 0.0, rings - 1)
    lo = np.floor(pos).astype(np.int64)
    lo = np.minimum(lo, rings - 1)
    frac = pos - lo
    w = np.zeros(r.shape + (rings,))
    valid = np.isfinite(r)
    np.put_along_axis(w, lo[..., None], ((1.0 - frac) * valid)[..., None], axis=-1)
    hi = np.minimum(lo + 1, rings - 1)
    # When lo == hi (last ring) the two parts add up to the full weight.
    upd = np.take_along_axis(w, hi[..., None], axis=-1)[..., 0] + frac * valid
    np.put_along_axis(w, hi[..., None], upd[..., None], axis=-1)
    return w


def _valid_ranges(ranges: np.ndarray, sensor: Sensor) -> np.ndarray:
    r = np.asarray(ranges, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(r) & (r >= sensor.min_range) & (r <= sensor.max_range)
    return np.where(ok, r, np.nan)


def _sector_plan(sensor: Sensor, sectors: int):
    """Beam order and block starts grouping beams by yaw sector."""
    bearing = se2.wrap(sensor.bearings() + sensor.mount[2])
    idx = np.floor((bearing + math.pi) / (TWO_PI / sectors)).astype(np.int64) % sectors
    order = np.argsort(idx, kind="stable")
    sorted_idx = idx[order]
    present, starts = np.unique(sorted_idx, return_index=True)
    return order, present, starts


def describe(ranges, sensor: Sensor, options: DescriptorOptions = DescriptorOptions()) -> ScanDescriptors:
    """Descriptors and yaw signatures of scans.

    Parameters
    ----------
    ranges : (K, B) ranges in metres (NaN, or values outside the sensor's
        limits, mean no return), e.g. ``log.ranges[keyframes]``.
    sensor : beam geometry; bearings are in the robot frame (the mount
        heading is added; a mount offset is ignored, it is centimetres).
    options : descriptor shape.

    Returns
    -------
    ScanDescriptors with ``vectors`` (K, options.size) and ``sectors``
    (K, options.yaw_sectors).
    """
    ranges = np.asarray(ranges)
    if ranges.ndim == 1:
        ranges = ranges[None]
    if ranges.ndim != 2 or ranges.shape[1] != sensor.beams:
        raise InputError(f"ranges must have shape (K, {sensor.beams}), got {ranges.shape}")
    k_scans = len(ranges)
    bearings = sensor.bearings() + sensor.mount[2]
    k = np.arange(options.harmonics + 1)
    # exp(-i k phi) per beam, scaled so a full circle of returns in one ring
    # gives |h_0| = 1.
    basis = np.exp(-1j * np.outer(bearings, k)) * (abs(sensor.angle_step) / TWO_PI)
    order, present, starts = _sector_plan(sensor, options.yaw_sectors)
    vectors = np.empty((k_scans, options.size))
    sig = np.full((k_scans, options.yaw_sectors), np.nan, dtype=np.float32)
    for start in range(0, k_scans, options.batch_scans):
        r = _valid_ranges(ranges[start:start + options.batch_scans], sensor)
        n = len(r)
        w = np.empty(r.shape + (options.rings + 1,))
        w[..., :-1] = _ring_weights(r, options)
        w[..., -1] = np.isnan(r) * options.no_return_weight
        h = np.einsum("nbr,bk->nrk", w, basis)
        c = options.compress_offset
        vectors[start:start + n] = (np.sqrt(np.abs(h) + c) - math.sqrt(c)).reshape(n, -1)
        valid = np.isfinite(r)[:, order]
        rs = np.where(valid, r[:, order], 0.0)
        counts = np.add.reduceat(valid, starts, axis=1)
        sums = np.add.reduceat(rs, starts, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            sig[start:start + n, present] = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    return ScanDescriptors(vectors, sig)


def _xcorr(fa: np.ndarray, fb: np.ndarray, n: int) -> np.ndarray:
    """Circular cross-correlation ``c[s] = sum_m a[m + s] b[m]`` from rffts."""
    return np.fft.irfft(fa * np.conj(fb), n=n, axis=-1)


def correlate_signatures(sig_a, sig_b, options: DescriptorOptions = DescriptorOptions()) -> np.ndarray:
    """Masked normalised cross-correlation of yaw signatures at every shift.

    Parameters
    ----------
    sig_a, sig_b : (P, S) sector signatures (NaN = sector not seen).

    Returns
    -------
    (P, S) correlation in [-1, 1]; entry s compares ``sig_a[m + s]`` with
    ``sig_b[m]`` over the sectors both see, i.e. the yaw ``dtheta = s *
    2pi / S``.  Shifts with too little common view (``yaw_min_overlap``) or a
    flat signature get -inf.
    """
    a = np.asarray(sig_a, dtype=np.float64)
    b = np.asarray(sig_b, dtype=np.float64)
    s = a.shape[-1]
    ma, mb = np.isfinite(a), np.isfinite(b)
    a0, b0 = np.where(ma, a, 0.0), np.where(mb, b, 0.0)
    fft = np.fft.rfft
    f_ma, f_a, f_aa = fft(ma.astype(float)), fft(a0), fft(a0 * a0)
    f_mb, f_b, f_bb = fft(mb.astype(float)), fft(b0), fft(b0 * b0)
    n = np.rint(_xcorr(f_ma, f_mb, s))
    sa = _xcorr(f_a, f_mb, s)
    sb = _xcorr(f_ma, f_b, s)
    saa = _xcorr(f_aa, f_mb, s)
    sbb = _xcorr(f_ma, f_bb, s)
    sab = _xcorr(f_a, f_b, s)
    with np.errstate(invalid="ignore", divide="ignore"):
        nn = np.maximum(n, 1.0)
        cov = sab - sa * sb / nn
        va = saa - sa * sa / nn
        vb = sbb - sb * sb / nn
        ncc = cov / np.sqrt(va * vb)
    # Variances are sums of squares; tiny values are FFT round-off of a flat
    # signature and carry no yaw information.
    scale = np.maximum(saa, 1e-12) * np.maximum(sbb, 1e-12)
    ok = (n >= options.yaw_min_overlap * s) & (va * vb > 1e-12 * scale) & np.isfinite(ncc)
    return np.where(ok, np.clip(ncc, -1.0, 1.0), -np.inf)


def estimate_yaw(sig_a, sig_b, count: int = 3, min_separation_rad: float = math.radians(10.0),
                 options: DescriptorOptions = DescriptorOptions(), batch_pairs: int = 4096):
    """Best yaw hypotheses between pairs of scans from their sector signatures.

    Parameters
    ----------
    sig_a, sig_b : (P, S) or (S,) signatures of scans A and B (see
        :class:`ScanDescriptors`).
    count : number of hypotheses per pair.
    min_separation_rad : hypotheses closer than this to a better one are
        suppressed.
    options : supplies ``yaw_min_overlap``.

    Returns
    -------
    yaw : (P, count) radians in (-pi, pi], best first: estimates of
        ``theta_b - theta_a`` (the heading of ``a^-1 ∘ b``).  NaN where fewer
        than ``count`` peaks exist.
    score : (P, count) normalised cross-correlation of each hypothesis
        (-inf where ``yaw`` is NaN).
    """
    a = np.asarray(sig_a)
    b = np.asarray(sig_b)
    single = a.ndim == 1
    a = a.reshape(-1, a.shape[-1])
    b = b.reshape(-1, b.shape[-1])
    if a.shape != b.shape:
        raise InputError(f"yaw signatures must have the same shape, got {a.shape} and {b.shape}")
    p, s = a.shape
    width = TWO_PI / s
    sep = max(1, int(math.ceil(min_separation_rad / width)))
    yaw = np.full((p, count), np.nan)
    score = np.full((p, count), -np.inf)
    offsets = np.arange(-sep, sep + 1)
    for start in range(0, p, batch_pairs):
        c = correlate_signatures(a[start:start + batch_pairs], b[start:start + batch_pairs], options)
        left, right = np.roll(c, 1, axis=1), np.roll(c, -1, axis=1)
        work = np.where((c >= left) & (c > right) & np.isfinite(c), c, -np.inf)
        rows = np.arange(len(c))
        for h in range(count):
            best = np.argmax(work, axis=1)
            val = work[rows, best]
            found = np.isfinite(val)
            # Parabola through the peak and its neighbours for a sub-sector shift.
            cl, cr = c[rows, best - 1], c[rows, (best + 1) % s]
            with np.errstate(invalid="ignore", divide="ignore"):
                denom = cl - 2.0 * val + cr
                off = np.where(np.isfinite(cl) & np.isfinite(cr) & (denom < 0), 0.5 * (cl - cr) / denom, 0.0)
            off = np.clip(off, -0.5, 0.5)
            yaw[start + rows[found], h] = se2.wrap((best[found] + off[found]) * width)
            score[start + rows[found], h] = val[found]
            cols = (best[:, None] + offsets[None, :]) % s
            work[rows[:, None], cols] = -np.inf
    if single:
        return yaw[0], score[0]
    return yaw, score


def estimate_yaw_pairs(sectors, a, b, count: int = 3, min_separation_rad: float = math.radians(10.0),
                       options: DescriptorOptions = DescriptorOptions(), batch_pairs: int = 1024):
    """:func:`estimate_yaw` for pairs of rows of one signature table.

    ``sectors`` (K, S) signatures, ``a`` and ``b`` (P,) row indices; the
    result is the yaw of ``a^-1 ∘ b`` for each pair.  Rows are gathered one
    batch at a time, so memory stays bounded for any number of pairs.
    """
    a = np.asarray(a, dtype=np.int64).reshape(-1)
    b = np.asarray(b, dtype=np.int64).reshape(-1)
    yaw = np.full((len(a), count), np.nan)
    score = np.full((len(a), count), -np.inf)
    for start in range(0, len(a), batch_pairs):
        stop = start + batch_pairs
        yaw[start:stop], score[start:stop] = estimate_yaw(
            sectors[a[start:stop]], sectors[b[start:stop]], count, min_separation_rad, options, batch_pairs)
    return yaw, score
