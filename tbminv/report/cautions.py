"""The cautions a shift report carries, and what its certainty words mean.

Plain text, one paragraph each, shared by the report pages (and quoted in the README's
cautions). The level thresholds come from the ``[ahead]`` settings the report used.
"""

from __future__ import annotations

import tbminv
from tbminv.results.ahead import AheadSettings

ELECTRICAL_SAFETY = (
    "Electrical safety: the electrodes carry current where people work. The measuring "
    "hardware, its isolation and earthing, and any restriction in gassy or wet conditions "
    "follow local electrical codes, the machine maker and the site's procedures; tbminv "
    "designs no hardware and says nothing about its safety."
)

NONE_SEEN = (
    "'None seen' is not 'all clear': a change smaller than the detection limit, farther ahead "
    "than the covered reach, off the axis, or hidden by noise shared by all readings can be "
    "present and unseen."
)

SYNTHETIC = "synthetic data: simulated readings, not measurements"


def certainty_words(st: AheadSettings) -> list[str]:
    """What the levels of concern mean, with the thresholds in force.

    Parameters
    ----------
    st : AheadSettings
        The thresholds the report used.

    Returns
    -------
    list of str
        One sentence per level, then the meaning of the false-alarm rate and the intervals.
    """
    return [
        "none seen: no change found within the covered reach (see the detection limit).",
        "watch: a change is seen, but no calibrated statistic supports it yet (an image "
        "step, an older pick, a drifting pick or a fit at a bound of its parameters).",
        f"likely: the latest contact fit's false-alarm rate is at most "
        f"{st.likely_p_false_alarm:g}, its position holds still as the face advances, seen "
        f"in at least {st.likely_advances} advances.",
        f"firm: as likely with a false-alarm rate at most {st.firm_p_false_alarm:g}, one "
        f"distance range, a closed contrast interval of at least x{st.firm_contrast:g}, seen "
        f"in at least {st.firm_advances} advances.",
        "false-alarm rate: the share of simulated drives without any change whose statistic "
        "scores as high; a p-value, not the probability that the change is real.",
        "Intervals are 95 % profile intervals of the contact fit; they hold what the model "
        "can explain, not errors of the model itself.",
    ]


def thresholds_note() -> str:
    """That the level thresholds are tool defaults to be set per site."""
    return ("The level thresholds are tbminv's defaults (settings table [ahead]); set them "
            "per site, with the site's engineers, before relying on the words.")


def all_cautions(st: AheadSettings, synthetic: bool) -> list[tuple[str, list[str]]]:
    """The cautions page as (heading, paragraphs) blocks.

    Parameters
    ----------
    st : AheadSettings
        Thresholds in force.
    synthetic : bool
        The readings were simulated.

    Returns
    -------
    list of (str, list of str)
    """
    blocks = [("Interpretation aid", [tbminv.CAUTION]),
              ("Electrical safety", [ELECTRICAL_SAFETY]),
              ("None seen", [NONE_SEEN]),
              ("What the certainty words mean", certainty_words(st) + [thresholds_note()])]
    if synthetic:
        blocks.insert(0, ("Synthetic data", [
            "The readings of this report were simulated (the readings log says so). Nothing "
            "in it describes real ground."]))
    return blocks


__all__ = ["ELECTRICAL_SAFETY", "NONE_SEEN", "SYNTHETIC", "certainty_words", "thresholds_note",
           "all_cautions"]
