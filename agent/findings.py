"""Defect evidence in the envelope spectrum, and what it means in plain words.

- :func:`search_defect`: for one defect frequency, its first harmonics (peak
  within ± the slip tolerance, amplitude, SNR over the local floor), and the
  sideband ratio at the modulating frequency.
- :func:`judge`: the findings (which signatures are present, how strong, how
  modulated), each with a sentence a maintenance technician can act on.

Rules (all thresholds are module constants, documented here):

- a harmonic *stands out* when it is at least ``HARMONIC_SNR_DB`` above the
  median of its neighbourhood, leaving out the places of its own 1x and 2x
  sidebands (:func:`agent.dsp.peaks.noise_floor`);
- a harmonic whose search window also holds another defect's harmonic or
  sideband is *ambiguous* and never counted as evidence; so is one within two
  bins of a low shaft harmonic (orders up to 10) when the envelope spectrum
  shows a comb of shaft harmonics of its own (looseness, rubs: at least
  ``SHAFT_COMB_MIN_LINES`` standing lines at orders 3-10 that are not the
  defect's harmonics), and, without such a comb, one within
  ``SHAFT_LINE_BINS`` of a shaft harmonic (too close to tell apart); so is a
  line that is only a ripple on the flank of another defect's line or
  sideband ``FLANK_STRONGER_DB`` stronger, with no dip deeper than
  ``FLANK_DIP_DB`` between them (slip broadens strong lines); when the
  peak found for the fundamental belongs to another defect (its line, a
  sideband, such a ripple), the harmonics are sought again at multiples of
  the expected rate, not of that peak;
- a defect whose own fundamental does not stand out unambiguously has no
  claim on another defect's standing lines, however near its expected
  harmonics lie to them;
- a defect signature is present when its fundamental stands out by at least
  ``FUNDAMENTAL_SNR_DB`` and at least ``MIN_HARMONICS`` unambiguous harmonics
  (the fundamental included) stand out;
- the sideband ratio is measured only around a fundamental that stands out
  (``HARMONIC_SNR_DB``): beside a line lost in the floor it would be a ratio
  of noise to noise, often well above 1, and is reported as ``None``;
- two defects whose standing fundamentals are one line are not both judged:
  the one whose own modulation shows in the sidebands is (when that does not
  decide, the one whose expected rate is nearer to the line; on a tie within
  ``TIE_BINS``, the race), and its finding's text says that the other rate
  falls on the same line; likewise a defect whose fundamental is a
  standing harmonic of another's found rate;
- a line is explained as another line's sideband only when it is not the
  stronger of the two (amplitude modulation never makes a sideband so);
- a sideband that falls on a standing line of another defect found present,
  and nearer to it than that defect's own harmonic is, belongs to that defect:
  the ratio is then twice the other sideband over the line (the two are equal
  for pure amplitude modulation), or ``None`` when both are taken;
- sidebands nearer to their line than ``MIN_SIDEBAND_BINS`` bins (a capture
  too short for the modulating frequency) are not measured: the finding says
  the load cannot be read from them rather than that there are none;
- the signature is *modulated* when the sideband ratio at the fundamental is
  at least ``SIDEBAND_RATIO_MIN`` and one sideband stands out;
- severity: ``high`` from ``HIGH_SNR_DB`` or ``HIGH_HARMONICS`` harmonics,
  ``medium`` from ``MEDIUM_SNR_DB`` or ``MEDIUM_HARMONICS``, else ``low``.

A capture with any quality flag gets no finding at all.
"""

from __future__ import annotations

import math

from agent.dsp.peaks import bin_floats, find_peak, noise_floor, sideband_ratio, snr_db

__all__ = ["DEFECTS", "search_defect", "shaft_lines", "count_harmonics", "judge",
           "summary_sentence", "modulation_meaning", "same_line_words", "sidebands_resolved"]

HARMONIC_SNR_DB = 6.0
FUNDAMENTAL_SNR_DB = 10.0
MIN_HARMONICS = 2
SIDEBAND_RATIO_MIN = 0.3
MEDIUM_SNR_DB = 16.0
HIGH_SNR_DB = 25.0
MEDIUM_HARMONICS = 4
HIGH_HARMONICS = 6
#: Standing shaft harmonics of orders 3-10, not the defect's own lines, that
#: show a comb of shaft harmonics (1x and 2x also come from load modulation).
SHAFT_COMB_MIN_LINES = 2
#: Without such a comb, a line this close to a shaft harmonic (in bins) still
#: cannot be told from it.
SHAFT_LINE_BINS = 0.5
#: Two defects' expected positions of a line closer than this (in bins) are a
#: tie: the line is evidence for neither.
TIE_BINS = 0.25
#: A peak within this relative distance of another defect's line that is
#: FLANK_STRONGER_DB stronger (twice its amplitude), with no dip deeper than
#: FLANK_DIP_DB between them (the valley stays above half the peak), is a
#: ripple on that line's flank: the two are not resolved.
FLANK_SPAN = 0.05
FLANK_STRONGER_DB = 6.0
FLANK_DIP_DB = 6.0
_FLANK_STRONGER = 10.0 ** (FLANK_STRONGER_DB / 20.0)
_FLANK_DIP = 10.0 ** (FLANK_DIP_DB / 20.0)
#: Sidebands nearer to their line than this many bins lie within its own
#: width (a Hann-windowed line spans +-2 bins, a slip-broadened one more) and
#: cannot be measured: a capture too short for its modulating frequency.
MIN_SIDEBAND_BINS = 2.5
#: A defect's line is taken for another defect's harmonic only when that
#: defect's fundamental is at least this fraction of it (-6 dB).
FAMILY_MIN_RATIO = 0.5

#: key -> (label, what it is, modulating frequency: "shaft" | "cage" | None)
DEFECTS = {
    "bpfo": ("BPFO", "Outer-race", "shaft"),
    "bpfi": ("BPFI", "Inner-race", "shaft"),
    "bsf": ("2xBSF", "Rolling-element", "cage"),
    "ftf": ("FTF", "Cage", None),
}


def _is_local_max(amp, k):
    return 0 < k < len(amp) - 1 and amp[k] >= amp[k - 1] and amp[k] >= amp[k + 1]


def search_defect(amp, df_hz, expected_hz, harmonics, tolerance, modulation_hz=None,
                  follow=True):
    """Evidence of one defect frequency in an envelope amplitude spectrum.

    Parameters
    ----------
    amp : ndarray or list of float
        Envelope amplitude spectrum on bins ``k * df_hz``.
    df_hz : float
        Bin spacing in Hz.
    expected_hz : float
        Defect frequency from the bearing geometry and the shaft speed.
    harmonics : int
        How many harmonics to search (fundamental included).
    tolerance : float
        Relative half-width of the fundamental's search window (slip), e.g.
        0.02.  Once the fundamental is found, harmonic ``h`` is sought near
        ``h`` times the *found* frequency, within ``tolerance / 4`` (the
        harmonics of a slipping bearing stay exact multiples of its actual
        rate).
    modulation_hz : float, optional
        Sideband spacing to measure around the fundamental, when the
        fundamental stands out by ``HARMONIC_SNR_DB``.
    follow : bool, default True
        Seek the harmonics near multiples of the found fundamental once it
        stands out; False: near multiples of ``expected_hz`` (used when the
        found peak turns out to be no line of this defect).

    Returns
    -------
    dict
        ``expected_hz``, ``found_hz`` (or None), ``amplitude``, ``snr_db``
        (of the fundamental), ``lines``: a list of ``(h, freq_hz, amplitude,
        snr_db)`` for each harmonic whose peak is a true local maximum,
        ``searched`` (harmonics inside the spectrum), ``sideband_ratio``,
        ``sideband_snr_db``, ``modulation_hz``.  :func:`count_harmonics`
        completes it with ``harmonics`` and ``peak_snr_db``.
    """
    n_hz = len(amp) * df_hz
    floor_hw = max(0.25 * expected_hz, 8 * df_hz)
    out = {"expected_hz": expected_hz, "found_hz": None, "amplitude": 0.0, "snr_db": 0.0,
           "lines": [], "searched": 0, "sideband_ratio": None, "sideband_snr_db": None,
           "modulation_hz": modulation_hz, "harmonics": 0, "peak_snr_db": 0.0,
           "base_hz": expected_hz, "sidebands": None, "tolerance": tolerance,
           "asked": harmonics}
    base = expected_hz
    resolved = sidebands_resolved(modulation_hz, df_hz)
    for h in range(1, harmonics + 1):
        target = h * base
        tol_hz = tolerance * target if h == 1 else 0.25 * tolerance * target
        if target + tol_hz + 8 * df_hz >= n_hz:
            break
        out["searched"] = h
        pk = find_peak(amp, df_hz, target, tol_hz)
        if pk is None or not _is_local_max(amp, pk.bin):
            continue
        s = snr_db(pk.amplitude, noise_floor(amp, df_hz, pk.freq_hz, floor_hw,
                                             exclude_hz=_sideband_places(pk.freq_hz, modulation_hz)))
        if h == 1:
            out.update(found_hz=pk.freq_hz, amplitude=pk.amplitude, snr_db=s)
            if s >= HARMONIC_SNR_DB and follow:
                base = pk.freq_hz
                out["base_hz"] = base
        out["lines"].append((h, pk.freq_hz, pk.amplitude, s))
    out["sidebands_resolved"] = resolved
    if out["found_hz"] is not None and modulation_hz and out["snr_db"] >= HARMONIC_SNR_DB \
            and resolved:
        fc = out["found_hz"]
        ratio, lower, upper = sideband_ratio(amp, df_hz, fc, modulation_hz,
                                             0.25 * tolerance * fc + 1.5 * df_hz)
        if math.isfinite(ratio):
            floor = noise_floor(amp, df_hz, fc, floor_hw,
                                exclude_hz=_sideband_places(fc, modulation_hz))
            out["sideband_ratio"] = ratio
            out["sideband_snr_db"] = snr_db(max(lower, upper), floor)
            carrier = (lower + upper) / ratio if ratio > 0 else out["amplitude"]
            out["sidebands"] = (lower, upper, carrier, floor)
    return out


def sidebands_resolved(modulation_hz, df_hz):
    """True when sidebands ``modulation_hz`` from their line can be told from it
    at a resolution of ``df_hz`` (at least ``MIN_SIDEBAND_BINS`` bins away),
    or when there is no modulating frequency to resolve."""
    if not modulation_hz or not df_hz:
        return True
    return modulation_hz >= MIN_SIDEBAND_BINS * df_hz


def _sideband_places(f_hz, modulation_hz):
    """Where a line's first and second sidebands would be (none without a
    modulating frequency)."""
    if not modulation_hz:
        return ()
    m = modulation_hz
    return (f_hz - 2.0 * m, f_hz - m, f_hz + m, f_hz + 2.0 * m)


def shaft_lines(amp, df_hz, shaft_hz, max_order=10):
    """Shaft harmonics that stand out in an envelope amplitude spectrum.

    Looseness and rubs fill the envelope with a comb of shaft harmonics; a
    bearing defect line that falls on one of them cannot be told from it
    (see :func:`count_harmonics`).

    Parameters
    ----------
    amp : ndarray or list of float
        Envelope amplitude spectrum on bins ``k * df_hz``.
    df_hz, shaft_hz : float
        Bin spacing and shaft speed in Hz.
    max_order : int, default 10

    Returns
    -------
    list of (int, float)
        ``(order, freq_hz)`` of each order whose peak, within 1.5 bins of
        ``order * shaft_hz``, is a local maximum ``HARMONIC_SNR_DB`` over the
        local floor.
    """
    out = []
    n_hz = len(amp) * df_hz
    for k in range(1, max_order + 1):
        f = k * shaft_hz
        if f + 8 * df_hz >= n_hz:
            break
        pk = find_peak(amp, df_hz, f, 0.0)
        if pk is None or not _is_local_max(amp, pk.bin):
            continue
        if snr_db(pk.amplitude, noise_floor(amp, df_hz, pk.freq_hz, max(0.25 * f, 8 * df_hz))) \
                >= HARMONIC_SNR_DB:
            out.append((k, pk.freq_hz))
    return out


def _explaining_lines(evidence, shaft_hz, skip):
    """Lines that another defect with a standing fundamental accounts for.

    Each is ``(freq_hz, expected_hz or None, carrier or None)``: the defect's
    own standing harmonics (with where that defect expects them), and the
    sidebands its modulation puts beside them (±1x and ±2x for the races,
    ±FTF and ±2 FTF for the rolling element, with the amplitude of the line
    they flank), which belong to nobody else -- as long as they are not
    stronger than that line: an amplitude-modulated line's sidebands never
    are.  A race or rolling-element defect's harmonics beyond those it
    searched (a point may search fewer than the spectrum holds) are included
    where it would put them, as whole multiples of its found rate, up to the
    highest line of ``skip``: a line there is no evidence for ``skip``.
    """
    ftf_hz = evidence["ftf"]["expected_hz"] if "ftf" in evidence else None
    top_hz = max((f for _, f, _, _ in evidence[skip]["lines"]), default=0.0)
    out = []
    for k, ev in evidence.items():
        if k == skip or ev["snr_db"] < FUNDAMENTAL_SNR_DB or ev.get("same_line_as"):
            continue
        mods = {"bpfo": (shaft_hz, 2 * shaft_hz), "bpfi": (shaft_hz, 2 * shaft_hz),
                "bsf": (ftf_hz, 2 * ftf_hz) if ftf_hz else ()}.get(k, ())
        for h, f, a, s in ev["lines"]:
            if s < HARMONIC_SNR_DB:
                continue
            out.append((f, h * ev["expected_hz"], None))
            for m in mods:
                out += [(f - m, None, a), (f + m, None, a)]
        if k != "ftf" and ev["snr_db"] >= HARMONIC_SNR_DB:
            h = ev["searched"] + 1
            while h * ev["base_hz"] <= top_hz:
                out.append((h * ev["base_hz"], h * ev["expected_hz"], None))
                h += 1
    return out


def _cage_comb_hz(evidence):
    """The cage rate when a rolling-element signature and its cage line both stand out.

    A damaged rolling element carried through the load zone fills the
    envelope with a comb of cage-rate lines; a race line that falls on that
    comb cannot be told apart from it.  The rate is taken from the found
    2xBSF line (more precise than the low FTF line itself).
    """
    bsf, ftf = evidence.get("bsf"), evidence.get("ftf")
    if not bsf or not ftf or bsf["found_hz"] is None or bsf.get("same_line_as"):
        return None
    if min(bsf["snr_db"], ftf["snr_db"]) < FUNDAMENTAL_SNR_DB:
        return None
    return bsf["found_hz"] * ftf["expected_hz"] / bsf["expected_hz"]


def count_harmonics(evidence, shaft_hz, df_hz, max_shaft_order=10, standing_shaft=None,
                    amp=None):
    """Count the harmonics that stand out and are not explained by something else.

    A line is *ambiguous* when it lies near a low shaft harmonic (see
    below), on the cage-rate comb of a rolling-element signature (races
    only), within two bins of a sideband of another defect, or of a
    standing line of another defect whose fundamental stands out -- unless
    this defect expects that line nearer than the other one does, by more
    than ``TIE_BINS`` (two defect rates a percent or two apart share their
    lines; the line goes to the nearer one, not to neither; on a tie, to
    neither).  Before that, of two defects whose standing fundamentals are
    one line, or one on a harmonic of the other, one is set aside
    (``same_line_as``): it is neither judged nor used to explain lines.

    Near a shaft harmonic means within two bins of it when the envelope
    spectrum shows a comb of shaft harmonics that this defect does not
    explain (``standing_shaft``: at least ``SHAFT_COMB_MIN_LINES`` of orders
    3-10 away from the defect's own harmonics), as looseness and rubs put
    there; without such a comb only within ``SHAFT_LINE_BINS``, where the
    two cannot be told apart.  A defect whose rate is close to a whole
    multiple of the shaft speed is thus judged on its own lines, not
    silenced by shaft harmonics the spectrum does not show.

    Then, for each defect present, a sideband that falls within two bins of
    a standing line of another present defect, and nearer to it than that
    defect's own harmonic (``h`` times its found rate) is, belongs to the
    other defect: the sideband ratio is then measured on the remaining
    sideband alone (twice it over the line; the two sidebands are equal for
    pure amplitude modulation), or dropped when both are taken.

    Parameters
    ----------
    evidence : dict
        ``{key: search_defect(...)}``; updated in place with ``harmonics``
        (unambiguous harmonics that stand out), ``peak_snr_db`` (best
        unambiguous SNR of the first three harmonics; of the first three
        unambiguous lines when the fundamental is ambiguous only for lying on
        a shaft harmonic without a comb) and ``fundamental_ambiguous``.
    shaft_hz, df_hz : float
    max_shaft_order : int, default 10
    standing_shaft : list of (int, float), optional
        :func:`shaft_lines` of the same spectrum.  Without it every low
        shaft harmonic is assumed present (the cautious reading).
    amp : ndarray or list of float, optional
        The spectrum itself.  With it, a line that lies on the flank of a
        much stronger line of another defect (:func:`_on_flank`) is
        ambiguous too.
    """
    guard = 2.0 * df_hz
    tie_hz = TIE_BINS * df_hz
    _mark_same_line(evidence, guard, tie_hz)
    cage_hz = _cage_comb_hz(evidence)
    for key, ev in evidence.items():
        others = _explaining_lines(evidence, shaft_hz, key)
        sidebands = [fo for fo, _, carrier in others if carrier is not None]

        def claimed(h, f, a, own_standing):
            """True when another defect accounts for the line (its line, sideband,
            flank or cage comb)."""
            if cage_hz and key in ("bpfo", "bpfi"):
                j = round(f / cage_hz)
                if j >= 1 and abs(f - j * cage_hz) <= guard:
                    return True
            # nearer expectation wins a shared line only for a defect whose own
            # fundamental stands: without it, another defect's standing line is
            # that defect's, however near this one's expected harmonic lies
            mine = abs(f - h * ev["expected_hz"]) if own_standing else math.inf
            if any(abs(f - fo) <= guard and (a <= carrier if expected is None
                                             else abs(f - expected) <= mine + tie_hz)
                   for fo, expected, carrier in others):
                return True
            return amp is not None and _on_flank(amp, df_hz, f, a, key, evidence, sidebands)

        own_standing = ev["found_hz"] is not None and ev["snr_db"] >= FUNDAMENTAL_SNR_DB
        if amp is not None and ev["base_hz"] != ev["expected_hz"] and ev["lines"] \
                and ev["lines"][0][0] == 1 and claimed(1, *ev["lines"][0][1:3], own_standing):
            _seek_at_expected(amp, df_hz, ev)
        comb = _shaft_comb(ev, standing_shaft, guard)
        shaft_guard = guard if comb else SHAFT_LINE_BINS * df_hz
        count, best, fund_amb = 0, 0.0, ev["found_hz"] is None
        on_shaft_only = False  # the fundamental is ambiguous for a shaft harmonic alone
        first_three = []  # SNRs of the first three unambiguous lines, whatever their order
        for h, f, a, s in ev["lines"]:
            k = round(f / shaft_hz)
            amb_shaft = 1 <= k <= max_shaft_order and abs(f - k * shaft_hz) <= shaft_guard
            amb_other = claimed(h, f, a, own_standing)
            amb = amb_shaft or amb_other
            if h == 1:
                fund_amb = amb
                on_shaft_only = amb_shaft and not amb_other
                own_standing = own_standing and (not amb or on_shaft_only)
            if amb:
                continue
            if s >= HARMONIC_SNR_DB:
                count += 1
            if h <= 3:
                best = max(best, s)
            if len(first_three) < 3:
                first_three.append(s)
        if on_shaft_only and not comb and first_three:
            # the low lines sit on shaft harmonics that show no comb of their own:
            # the next lines of the defect carry the evidence
            best = max(first_three)
        ev.update(harmonics=count, peak_snr_db=best, fundamental_ambiguous=fund_amb)
    present = [k for k, ev in evidence.items() if _present(ev)]
    for key in present:
        ev = evidence[key]
        if ev["sideband_ratio"] is None or not ev["modulation_hz"] or ev["sidebands"] is None:
            continue
        claims = [(f, h * evidence[k]["base_hz"]) for k in present if k != key
                  for h, f, _, s in evidence[k]["lines"] if s >= HARMONIC_SNR_DB]
        fc, fm = ev["found_hz"], ev["modulation_hz"]
        lower, upper, carrier, floor = ev["sidebands"]

        def taken(pos):
            return any(abs(f - pos) <= guard and abs(f - own) <= abs(f - pos) for f, own in claims)

        kept = [a for a, pos in ((lower, fc - fm), (upper, fc + fm)) if not taken(pos)]
        if len(kept) == 2:
            continue
        if kept and carrier > 0:
            ev["sideband_ratio"] = 2.0 * kept[0] / carrier
            ev["sideband_snr_db"] = snr_db(kept[0], floor)
        else:
            ev["sideband_ratio"] = None
            ev["sideband_snr_db"] = None
    return evidence


def _seek_at_expected(amp, df_hz, ev):
    """The peak taken for a defect's fundamental belongs to another defect (its
    line, a sideband, a ripple on its flank): the harmonics, sought at
    multiples of that peak, would follow the other defect's lattice of lines
    and sidebands up the spectrum.  Seek them again at multiples of the
    expected rate."""
    again = search_defect(amp, df_hz, ev["expected_hz"], ev["asked"], ev["tolerance"],
                          follow=False)
    ev["lines"] = ev["lines"][:1] + [line for line in again["lines"] if line[0] >= 2]
    ev["base_hz"] = ev["expected_hz"]
    ev["searched"] = again["searched"]  # harmonics inside the spectrum at the expected rate


def _on_flank(amp, df_hz, f_hz, amplitude, skip, evidence, sidebands=()):
    """True when a peak at ``f_hz`` is a ripple on the flank of a line of
    another defect: a standing line, or the strongest bin within two bins of
    one of its sidebands (``sidebands``: positions in Hz), within
    ``FLANK_SPAN`` of it (relative), ``FLANK_STRONGER_DB`` stronger, with no
    dip of more than ``FLANK_DIP_DB`` between the two.  Slip makes a strong
    line broad, and its flank carries local maxima that stand over the median
    floor further out; two peaks without such a dip between them are not
    resolved, and the stronger one is the line."""
    k = int(round(f_hz / df_hz))
    near = []  # (bin, amplitude) of the other defects' lines within reach
    for key, ev in evidence.items():
        if key == skip or ev.get("same_line_as"):
            continue
        near += [(int(round(f / df_hz)), a) for _, f, a, s in ev["lines"]
                 if s >= FUNDAMENTAL_SNR_DB and abs(f - f_hz) <= FLANK_SPAN * f_hz]
    for f in sidebands:
        if abs(f - f_hz) <= FLANK_SPAN * f_hz:
            j = int(round(f / df_hz))
            vals = bin_floats(amp, max(j - 2, 0), j + 3)
            if vals:
                a = max(vals)
                near.append((max(j - 2, 0) + vals.index(a), a))
    for j, a in near:
        if j == k or a < amplitude * _FLANK_STRONGER:
            continue
        between = bin_floats(amp, min(j, k) + 1, max(j, k))
        if between and amplitude <= min(between) * _FLANK_DIP:
            return True
    return False


def _mark_same_line(evidence, guard, tie_hz):
    """Two defects whose standing fundamentals are one line cannot be told apart
    by their lines: one of them gets ``same_line_as`` (the other's key) and is
    neither judged nor used to explain lines.

    It is the one whose own modulation does not show in the sidebands while
    the other's does (a race's at 1x, a rolling element's at FTF): the
    sidebands are the physics of the fault, while which expected rate lies a
    fraction of a percent nearer to the line says little when slip moves real
    rates by 1-2 %.  When the sidebands do not decide, it is the one whose
    expected rate lies farther from the line; when both lie equally near
    (within ``tie_hz``), the rolling element (its impacts are carried through
    the load zone at the cage rate, so a line without FTF sidebands is more
    likely a race's).  A defect whose fundamental is a
    standing harmonic (2nd or higher) of another race's or rolling element's
    found rate is marked too, with ``same_line_harmonic`` (its lines are that
    defect's harmonics), provided that defect's own fundamental is at least
    ``FAMILY_MIN_RATIO`` of the line: a harmonic does not stand far above its
    fundamental.
    """
    standing = [k for k, ev in evidence.items()
                if ev["found_hz"] is not None and ev["snr_db"] >= FUNDAMENTAL_SNR_DB]
    for a in standing:
        ea = evidence[a]
        for b in standing:
            eb = evidence[b]
            if a == b or abs(ea["found_hz"] - eb["found_hz"]) > guard:
                continue
            da = abs(ea["found_hz"] - ea["expected_hz"])
            db = abs(eb["found_hz"] - eb["expected_hz"])
            ma, mb = _modulated(ea), _modulated(eb)
            if ma != mb:
                lose = not ma
            elif abs(da - db) <= tie_hz:
                lose = a == "bsf" or (b != "bsf" and da > db)
            else:
                lose = da > db
            if lose:
                ea["same_line_as"] = b
    for a in standing:
        ea = evidence[a]
        if ea.get("same_line_as"):
            continue
        for b in standing:
            eb = evidence[b]
            if b in (a, "ftf") or eb.get("same_line_as") or eb["found_hz"] >= ea["found_hz"]:
                continue
            h = round(ea["found_hz"] / eb["found_hz"])
            # a harmonic does not stand far above its own fundamental: a weak
            # "fundamental" under a strong line is no parent of it
            if h >= 2 and eb["amplitude"] >= FAMILY_MIN_RATIO * ea["amplitude"] and any(
                    hb == h and abs(f - ea["found_hz"]) <= guard and s >= HARMONIC_SNR_DB
                    for hb, f, _, s in eb["lines"]):
                ea["same_line_as"] = b
                ea["same_line_harmonic"] = h
                break


def _shaft_comb(ev, lines, guard):
    """True when ``lines`` (standing shaft harmonics; None: unknown) show a
    comb that the defect's own harmonics do not explain."""
    if lines is None:
        return True
    own = [h * ev["base_hz"] for h in range(1, ev["searched"] + 1)]
    apart = [f for k, f in lines if k >= 3 and all(abs(f - p) > guard for p in own)]
    return len(apart) >= SHAFT_COMB_MIN_LINES


def _severity(ev):
    if ev["peak_snr_db"] >= HIGH_SNR_DB or ev["harmonics"] >= HIGH_HARMONICS:
        return "high"
    if ev["peak_snr_db"] >= MEDIUM_SNR_DB or ev["harmonics"] >= MEDIUM_HARMONICS:
        return "medium"
    return "low"


def _present(ev):
    if ev.get("same_line_as"):
        return False
    if ev["found_hz"] is None or ev["fundamental_ambiguous"]:
        return ev["harmonics"] >= MIN_HARMONICS + 1 and ev["peak_snr_db"] >= FUNDAMENTAL_SNR_DB
    return ev["snr_db"] >= FUNDAMENTAL_SNR_DB and ev["harmonics"] >= MIN_HARMONICS


def _modulated(ev):
    return (ev["sideband_ratio"] is not None and ev["sideband_ratio"] >= SIDEBAND_RATIO_MIN
            and (ev["sideband_snr_db"] or 0.0) >= HARMONIC_SNR_DB)


_MEANING = {
    ("bpfo", "shaft"): ("with sidebands at shaft speed: the impacts swell and fade once per "
                        "turn, so the load turns with the shaft, typically unbalance"),
    ("bpfo", "none"): ("evenly spaced with no shaft-rate sidebands: the load stays put "
                       "(gravity, the load zone), as usual for an outer-race defect"),
    ("bpfi", "shaft"): ("with sidebands at shaft speed: the defect turns with the shaft through "
                        "a stationary load zone (shaft weight, belt pull)"),
    ("bpfi", "none"): ("evenly spaced with no shaft-rate sidebands: the load turns with the "
                       "inner race, as a dominant unbalance does"),
    ("bsf", "cage"): ("with sidebands at the cage rate (FTF): a damaged rolling element is "
                      "carried through the load zone once per cage turn"),
    ("bsf", "none"): "with no cage-rate sidebands",
    ("ftf", "none"): "at the cage rate: a worn or broken cage, or a rolling element defect",
}
_UNRESOLVED = {
    "bpfo": ("its shaft-rate sidebands would lie within the line's own width at this "
             "resolution (the capture is too short), so what the load does cannot be read"),
    "bpfi": ("its shaft-rate sidebands would lie within the line's own width at this "
             "resolution (the capture is too short), so what the load does cannot be read"),
    "bsf": ("its cage-rate sidebands would lie within the line's own width at this "
            "resolution (the capture is too short), so they cannot be read"),
}


def modulation_meaning(key, modulation, resolved=True):
    """What the sidebands of a defect's lines, or their absence, say about the load.

    The one wording of it, used by the findings and by the alert reasons.

    Parameters
    ----------
    key : str
        ``"bpfo"``, ``"bpfi"``, ``"bsf"`` or ``"ftf"``.
    modulation : str
        ``"shaft"``, ``"cage"`` or ``"none"`` (a finding's ``modulation``).
    resolved : bool, default True
        False when the capture was too short to resolve the defect's
        sidebands (:func:`sidebands_resolved`): the clause says so instead
        of reading an absence of sidebands.

    Returns
    -------
    str
        A clause without a final full stop, e.g. "with sidebands at shaft
        speed: ..."; empty for a combination with nothing to say.
    """
    if not resolved and key in _UNRESOLVED:
        return _UNRESOLVED[key]
    return _MEANING.get((key, modulation if modulation in ("shaft", "cage") else "none"), "")


def _text(key, ev, modulation, severity):
    label, what, _ = DEFECTS[key]
    meaning = modulation_meaning(key, modulation, ev.get("sidebands_resolved", True))
    strength = {"low": "Weak", "medium": "Clear", "high": "Strong"}[severity]
    found = ev["found_hz"] if ev["found_hz"] is not None else ev["expected_hz"]
    return (f"{strength} {what.lower()} defect signature at {found:.1f} Hz ({label}, "
            f"{ev['harmonics']} of {ev['searched']} harmonics, {ev['peak_snr_db']:.0f} dB above "
            f"the noise floor), {meaning}.")


def judge(evidence, flagged):
    """Findings from the evidence of every defect.

    Parameters
    ----------
    evidence : dict
        ``{"bpfo": search_defect(...), "bpfi": ..., "bsf": ..., "ftf": ...}``.
    flagged : bool
        True when the capture failed the quality gate: no finding then.

    Returns
    -------
    list of dict
        ``{"defect", "severity", "modulation", "text"}`` for each signature
        present; an empty list means no bearing defect signature.
    """
    if flagged:
        return []
    out = []
    for key in ("bpfo", "bpfi", "bsf", "ftf"):
        ev = evidence.get(key)
        if ev is None or not _present(ev):
            continue
        mod_kind = DEFECTS[key][2]
        modulation = mod_kind if (mod_kind and _modulated(ev)) else "none"
        severity = _severity(ev)
        text = _text(key, ev, modulation, severity)
        for other, oev in evidence.items():
            if oev.get("same_line_as") == key:
                text += f" {same_line_words(other, key, oev.get('same_line_harmonic'))}."
        out.append({"defect": key, "severity": severity, "modulation": modulation,
                    "text": text})
    # A cage line explained by a rolling-element signature's sidebands is not a second finding.
    keys = {f["defect"] for f in out}
    if "ftf" in keys and "bsf" in keys:
        out = [f for f in out if f["defect"] != "ftf"]
    return out


def same_line_words(key, on_key, harmonic=None):
    """The one wording of a defect set aside for falling on another's line.

    Parameters
    ----------
    key : str
        The defect set aside (its evidence has ``same_line_as == on_key``).
    on_key : str
        The defect whose line it falls on.
    harmonic : int, optional
        ``same_line_harmonic``: it falls on that harmonic of ``on_key``.

    Returns
    -------
    str
        E.g. "This bearing's 2xBSF (rolling-element defect rate) falls on the
        BPFO line: the envelope cannot tell the two apart", without a final
        full stop.
    """
    label, what, _ = DEFECTS[key]
    on_label = DEFECTS[on_key][0]
    if harmonic:
        ordinal = {2: "2nd", 3: "3rd"}.get(harmonic, f"{harmonic}th")
        where = f"the {ordinal} harmonic of {on_label}"
    else:
        where = f"the {on_label} line"
    return (f"This bearing's {label} ({what.lower()} defect rate) falls on {where}: "
            f"the envelope cannot tell the two apart")


def summary_sentence(findings, unresolved=()):
    """One sentence on what the modulation says about the load, or ''.

    ``unresolved``: defects whose sidebands the capture could not resolve
    (their ``"none"`` says nothing about the load)."""
    mods = {f["defect"]: f["modulation"] for f in findings if f["defect"] not in unresolved}
    o, i = mods.get("bpfo"), mods.get("bpfi")
    if o == "shaft" and i == "shaft":
        return ("Both races show shaft-rate modulation: a rotating load (unbalance) and a "
                "stationary load (weight, load zone) act together.")
    if o == "shaft":
        return "Shaft-rate modulation of the outer-race impacts points to a rotating load: unbalance."
    if i == "shaft":
        return "Shaft-rate modulation of the inner-race impacts points to a stationary load zone."
    if o == "none" and i == "none":
        return "Both races show even impacts: no dominant varying load."
    return ""
