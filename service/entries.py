"""The rules one ``[[alarms]]``, ``[[bands]]`` or ``[[tones]]`` entry must meet on its own
(levels, edges, which keys go together), each written once: the config's validators
(``service.config.models``) and the alarm rules (``service.alarms.rules``) call these.

Pure functions on numbers; imports nothing of the service, pydantic or the engine."""

from __future__ import annotations

import math

RELATIVE_PAIRS = (
    "with baseline_learn_s give alert_factor and danger_factor, or alert_db and danger_db"
)


class EntryProblem(ValueError):
    """One problem of one config entry: ``key`` is the entry's key it is at (``""``: the
    entry as a whole), ``text`` the reason. The config reports it as ``<entry>.<key>: text``."""

    def __init__(self, key: str, text: str) -> None:
        super().__init__(f"{key}: {text}" if key else text)
        self.key, self.text = key, text


def _ordered(lo_key: str, lo: float, hi_key: str, hi: float) -> None:
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
        raise EntryProblem(hi_key, f"{hi:g} must be above {lo_key} {lo:g}")


def check_absolute(alert: float | None, danger: float | None) -> None:
    """Absolute levels: both given, 0 < alert < danger."""
    if alert is None or danger is None:
        raise EntryProblem("", "give alert and danger levels (or baseline_learn_s)")
    _ordered("alert", alert, "danger", danger)


def check_relative(
    alert_factor: float | None,
    danger_factor: float | None,
    alert_db: float | None,
    danger_db: float | None,
) -> None:
    """Relative levels: one whole pair (factors or dB) and nothing of the other, the alert
    one below the danger one."""
    factors, dbs = (alert_factor, danger_factor), (alert_db, danger_db)
    by_factor, by_db = None not in factors, None not in dbs
    if by_factor == by_db or any(v is not None for v in (dbs if by_factor else factors)):
        raise EntryProblem("", RELATIVE_PAIRS)
    if alert_factor is not None and danger_factor is not None:
        _ordered("alert_factor", alert_factor, "danger_factor", danger_factor)
    elif alert_db is not None and danger_db is not None:
        _ordered("alert_db", alert_db, "danger_db", danger_db)


def check_alarm_entry(
    *,
    band: str | None,
    tone: str | None,
    overall: bool,
    alert: float | None,
    danger: float | None,
    baseline_learn_s: float | None,
    alert_factor: float | None = None,
    danger_factor: float | None = None,
    alert_db: float | None = None,
    danger_db: float | None = None,
) -> None:
    """One ``[[alarms]]`` entry on its own: one value watched, and absolute or relative
    levels (not both) that make sense. Raises :class:`EntryProblem`."""
    if (band is not None) + (tone is not None) + overall != 1:
        raise EntryProblem("", "give exactly one of band, tone or overall = true")
    if baseline_learn_s is None:
        check_absolute(alert, danger)
        return
    if alert is not None or danger is not None:
        raise EntryProblem("", "give either absolute alert/danger or baseline_learn_s, not both")
    check_relative(alert_factor, danger_factor, alert_db, danger_db)


def check_edges(lo_key: str, lo: float | None, hi_key: str, hi: float | None) -> None:
    """A band's two edges: both given, lo below hi."""
    if lo is None or hi is None:
        missing, other = (lo_key, hi_key) if lo is None else (hi_key, lo_key)
        raise EntryProblem(missing, f"required with {other}")
    if not lo < hi:
        raise EntryProblem(hi_key, f"{hi:g} must be above {lo_key} {lo:g}")


def check_band_entry(
    *,
    lo_hz: float | None,
    hi_hz: float | None,
    lo_order: float | None,
    hi_order: float | None,
    octave: int | None,
    octave_fractions: tuple[int, ...],
) -> None:
    """One ``[[bands]]`` entry on its own: edges in Hz or in orders (not both), an octave
    set only in Hz with lo_hz > 0 and b one of ``octave_fractions``."""
    has_hz = lo_hz is not None or hi_hz is not None
    has_order = lo_order is not None or hi_order is not None
    if has_hz == has_order:
        raise EntryProblem("", "give lo_hz and hi_hz (Hz) or lo_order and hi_order (orders)"
                           + (", not both" if has_hz else ""))
    if octave is not None:
        if octave not in octave_fractions:
            listed = ", ".join(map(str, octave_fractions))
            raise EntryProblem("octave", f"{octave!r} is not one of {listed}")
        if has_order:
            raise EntryProblem("octave", "octave sets are in Hz; give lo_hz and hi_hz")
    if has_hz:
        check_edges("lo_hz", lo_hz, "hi_hz", hi_hz)
        if octave is not None and not lo_hz:
            raise EntryProblem("lo_hz", "an octave set needs lo_hz > 0")
    else:
        check_edges("lo_order", lo_order, "hi_order", hi_order)


def check_tone_entry(*, hz: float | None, order: float | None) -> None:
    """One ``[[tones]]`` entry on its own: a fixed frequency or an order, not both."""
    if (hz is None) == (order is None):
        raise EntryProblem("", "give exactly one of hz or order")
