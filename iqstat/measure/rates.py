"""The link's symbol rate and tone spacing: blind estimates where the profile lacks them, and
the blind check of the rates a profile gives.

:func:`_blind_rates` estimates the rates blind (:func:`iqstat.estimate.estimate_link_many`) on
at most BLIND_RATE_BURSTS bursts spread over the capture and refines them across bursts
(:func:`iqstat.estimate.refine_link_across_bursts`, weighted by each burst's symbols: the error
falls as 1/√n). :func:`_check_profile_rates` estimates the longest burst blind and flags a
symbol rate further than RATE_MISMATCH_FRACTION, or a tone spacing further than
SPACING_MISMATCH_FRACTION, from the profile's (an estimate that says it is unreliable is no
evidence). Both see far oversampled bursts narrowed first
(:func:`iqstat.measure.windows._narrowed`).
"""

from __future__ import annotations

import numpy as np

from iqstat.errors import IqstatError, MeasurementError
from iqstat.estimate import estimate_link, estimate_link_many, refine_link_across_bursts
from iqstat.measure.windows import _batches, _narrowed, _read_burst, _read_bursts
from iqstat.profile import LinkProfile

#: Most bursts estimated blind to refine an unknown symbol rate or tone spacing.
BLIND_RATE_BURSTS = 128

#: The blind check of the profile's rates looks at most this many samples of the longest
#: burst (its middle): 2.6 k symbols at 4.8 kBd and 250 kS/s, for a 1 % rate test.
CHECK_MAX_SAMPLES = 1 << 17

#: An estimated symbol rate further than this from the profile's is flagged.
RATE_MISMATCH_FRACTION = 0.01

#: An estimated tone spacing further than this from the profile's is flagged.
SPACING_MISMATCH_FRACTION = 0.05


def _blind_rates(capture, detection, profile, margin) -> tuple[float | None, float | None]:
    """Symbol rate and tone spacing from blind per-burst estimates, refined across bursts.

    Only for what the profile does not give; returns the profile's values otherwise. At most
    BLIND_RATE_BURSTS bursts, spread evenly over the capture, are estimated: the refined
    rate's error falls as 1/√n, and beyond ~100 bursts it is far below what a burst's own
    timing can see.
    """
    fs = capture.sample_rate_hz
    bursts = detection.bursts
    if len(bursts) > BLIND_RATE_BURSTS:
        pick = np.linspace(0, len(bursts) - 1, BLIND_RATE_BURSTS).round().astype(int)
        bursts = tuple(bursts[i] for i in pick)
    good = []
    for batch in _batches(bursts, margin):
        windows = _read_bursts(capture, batch, margin, detection)
        narrowed = [_narrowed(x, fs, detection.band_hz) for _, x in windows]
        by_rate: dict[float, list[np.ndarray]] = {}
        for y, fs_y in narrowed:
            by_rate.setdefault(fs_y, []).append(y)
        for fs_y, ys in by_rate.items():
            ests = estimate_link_many(
                ys,
                fs_y,
                modulation=profile.modulation,
                symbol_rate_hz=profile.symbol_rate_hz,
                tone_spacing_hz=profile.tone_spacing_hz,
            )
            good.extend(e for e in ests if not isinstance(e, MeasurementError))
    if not good:
        return profile.symbol_rate_hz, profile.tone_spacing_hz
    weights = [e.quality.get("n_symbols", 1) or 1 for e in good]
    rate, spacing = refine_link_across_bursts(good, weights)
    return rate, (spacing if profile.modulation != "ook" else None)


def _sources(profile: LinkProfile) -> dict[str, str]:
    """Where a burst's rates come from: the profile, or estimated (refined across bursts)."""
    return dict(
        symbol_rate_source="profile" if profile.symbol_rate_hz is not None else "estimated",
        tone_spacing_source=(
            "n/a"
            if profile.modulation == "ook"
            else "profile"
            if profile.tone_spacing_hz is not None
            else "estimated"
        ),
    )


def _check_profile_rates(capture, detection, profile, margin) -> tuple[str, ...]:
    """Blind estimate on the longest burst, compared with the rates the profile gives."""
    if not detection.bursts or (profile.symbol_rate_hz is None and profile.tone_spacing_hz is None):
        return ()
    longest = max(detection.bursts, key=lambda b: b.n_samples)
    _, x = _read_burst(capture, longest, margin, detection)
    if x.size > CHECK_MAX_SAMPLES:  # the middle of a long one: the check needs no more
        a = (x.size - CHECK_MAX_SAMPLES) // 2
        x = x[a : a + CHECK_MAX_SAMPLES]
    y, fs_y = _narrowed(x, capture.sample_rate_hz, detection.band_hz)
    try:
        blind = estimate_link(y, fs_y, modulation=profile.modulation)
    except IqstatError:
        return ()
    if not blind.quality.get("reliable", True):
        return ()  # an estimate that says it is unsure is no evidence against the profile
    flags = []
    if profile.symbol_rate_hz is not None and (
        abs(blind.symbol_rate_hz / profile.symbol_rate_hz - 1) > RATE_MISMATCH_FRACTION
    ):
        flags.append("symbol-rate-mismatch")
    if (
        profile.tone_spacing_hz is not None
        and blind.tone_spacing_hz is not None
        and (abs(blind.tone_spacing_hz / profile.tone_spacing_hz - 1) > SPACING_MISMATCH_FRACTION)
    ):
        flags.append("tone-spacing-mismatch")
    return tuple(flags)
