"""Specimen presets: a rate band to search and the rates that are plausible, with sources.

A preset only sets the search band and arms plausibility warnings; it never
changes a measurement. The ranges are for research specimens, not clinical
reference values: tempofield is not a diagnostic device.
"""

from __future__ import annotations

from dataclasses import dataclass

from tempofield.errors import InputError


@dataclass(frozen=True)
class Specimen:
    """Search band and plausible ranges for one kind of specimen.

    ``source`` and ``conduction_source`` are the citations shown to users in
    plausibility warnings; how sure each one is stays in the comments above
    :data:`SPECIMENS`.
    """

    name: str
    description: str
    rate_range_bpm: tuple[float, float]
    plausible_bpm: tuple[float, float]
    source: str
    conduction_um_s: tuple[float, float] | None = None
    conduction_source: str = ""


# Notes on the sources, for the maintainers (``source`` is shown to users in
# plausibility warnings, so it holds the citation only):
# - hpsc-cardiomyocytes: the 0.2-3 Hz range is partly recalled from memory,
#   not re-read in Liu, Laksman & Backx 2016; check it against the paper.
# - mouse-heart: Tan et al. 2003 was cited from memory (no volume or page);
#   check the range and complete the reference.
SPECIMENS: dict[str, Specimen] = {s.name: s for s in (
    Specimen("hpsc-cardiomyocytes", "stem-cell-derived heart-muscle cells beating on their own",
             (10.0, 200.0), (12.0, 180.0),
             "Liu, Laksman & Backx 2016, Adv Drug Deliv Rev 96:253 (about 0.2-3 Hz)",
             (1e4, 3e5), "about 1-30 cm/s: review table in PMC4635107 (Burridge 2011; Thompson 2012); "
                         "Lee et al. 2012, Circ Res 110:1556"),
    Specimen("zebrafish-heart-28c", "zebrafish embryo or larva heart at 28 degrees C",
             (90.0, 260.0), (120.0, 225.0), "Barrionuevo & Burggren 1999, Am J Physiol 276:R505"),
    Specimen("mouse-heart", "mouse heart, anaesthetised to conscious", (200.0, 850.0), (250.0, 750.0),
             "Tan et al. 2003, J Cardiovasc Pharmacol"),
    Specimen("airway-cilia", "human airway cilia (photometric or high-speed video)", (180.0, 1500.0),
             (300.0, 1200.0), "about 5-20 Hz depending on method and temperature: Rutland, Griffin & Cole 1982, "
                              "Am Rev Respir Dis 125:100; Nikolaizik et al. 2020, ERJ Open Res 6:00477-2020"),
)}


def get_specimen(name: str) -> Specimen:
    """The preset called ``name``; an unknown name is an error listing the known ones."""
    try:
        return SPECIMENS[name]
    except KeyError:
        raise InputError(f"unknown specimen={name!r}; the known presets are: {', '.join(SPECIMENS)}.") from None


def plausibility_warnings(specimen: Specimen, table, frame_interval_s: float) -> list[str]:
    """Warnings when a result lies outside the preset's plausible ranges, or the frame rate is too low.

    ``table`` is a region table (pandas DataFrame) with ``rate_median_bpm`` and
    ``conduction_velocity_um_s`` columns.
    """
    out = []
    nyquist_bpm = 30.0 / frame_interval_s
    if specimen.plausible_bpm[1] >= nyquist_bpm:
        out.append(f"the frame rate ({1 / frame_interval_s:.3g} per s) is too low for {specimen.name}: rates up to "
                   f"{specimen.plausible_bpm[1]:g} bpm need more than {specimen.plausible_bpm[1] / 30:.3g} frames "
                   "per second (twice the beat frequency, Shannon 1949); faster rhythms would alias.")
    lo, hi = specimen.plausible_bpm
    for row in table.itertuples(index=False):
        rate = getattr(row, "rate_median_bpm")
        if rate == rate and not (lo <= rate <= hi):
            out.append(f"region {row.region}: rate {rate:.1f} bpm is outside the plausible {lo:g}-{hi:g} bpm "
                       f"for {specimen.name} ({specimen.source}).")
        cv = getattr(row, "conduction_velocity_um_s", float("nan"))
        if specimen.conduction_um_s and cv == cv and not (specimen.conduction_um_s[0] <= cv
                                                          <= specimen.conduction_um_s[1]):
            out.append(f"region {row.region}: conduction velocity {cv:.4g} um/s is outside the plausible "
                       f"{specimen.conduction_um_s[0]:g}-{specimen.conduction_um_s[1]:g} um/s for {specimen.name} "
                       f"({specimen.conduction_source}).")
    return out
