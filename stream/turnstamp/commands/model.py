"""``turnstamp model``: check spin-model files, or print their summary.

``model check`` validates each file and states any warning; ``model summary``
prints every input exactly as written (epochs, frequency, each derivative,
validity window, position) and the derived spin-down summary: period, period
derivative, spin-down power, characteristic age, surface dipole field and braking
index, each with its unit once. Both warn when a frequency or derivative is given
with too few digits for its validity window (``core.spin.digit_warnings``).
"""

from __future__ import annotations

import json

__all__ = ["add_parser", "run", "summary_lines", "summary_json", "DERIVED"]

DERIVED = (("period_s", "period", "s"), ("period_derivative", "period derivative", "s/s"),
           ("spin_down_power_erg_per_s", "spin-down power", "erg/s"),
           ("characteristic_age_yr", "characteristic age", "yr"),
           ("surface_dipole_field_gauss", "surface dipole field", "G"),
           ("braking_index", "braking index", ""))
"""Derived quantities: key of ``spin_down_summary``, label, unit (printed once)."""
_ORDINAL = {1: "1st", 2: "2nd", 3: "3rd"}


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "model", help="check spin models or print their summary",
        description="check: validate each spin-model file and print its warnings. summary: "
                    "every input as written (exact decimals) and the spin-down summary.")
    p.add_argument("action", choices=["summary", "check"],
                   help="summary: inputs at full precision, period, period derivative, "
                        "spin-down power, characteristic age, surface field, braking index, "
                        "validity; check: validate only")
    p.add_argument("models", nargs="+", metavar="MODEL", help="spin model files (TOML/JSON)")
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..core.spin import digit_warnings
    from ..files.inputs import load_spin_model

    documents = []
    for path in args.models:
        model = load_spin_model(path)
        warnings = digit_warnings(model)
        if args.json:
            documents.append({"file": str(path), **summary_json(model), "warnings": warnings})
        elif args.action == "check":
            state = "ok" if not warnings else f"ok, with {len(warnings)} warning(s)"
            print(f"{path}: {state} ({model.model_id}, phase reference "
                  f"{model.phase_reference_key()})")
            for warning in warnings:
                print(f"  warning: {warning}")
        else:
            print("\n".join([*summary_lines(model), *(f"  warning: {w}" for w in warnings)]))
    if args.json:
        print(json.dumps(documents, indent=2))
    return 0


def _shown(value) -> str:
    return f"{value:.10g}" if isinstance(value, float) else str(value)


def _mjd(value) -> str:
    return f"MJD {value} TDB"


def input_lines(model) -> list[str]:
    """Every input that fixes phase, exactly as written in the file."""
    t = model.target
    rows = [("position", f"RA {t.right_ascension_deg} deg, Dec {t.declination_deg} deg "
                         f"(ICRS at {_mjd(t.position_epoch_mjd_tdb)})")]
    if t.proper_motion_ra_mas_per_yr or t.proper_motion_dec_mas_per_yr or t.parallax_mas:
        rows.append(("proper motion", f"{t.proper_motion_ra_mas_per_yr} mas/yr in RA cos Dec, "
                                      f"{t.proper_motion_dec_mas_per_yr} mas/yr in Dec; "
                                      f"parallax {t.parallax_mas} mas"))
    rows += [("reference epoch", _mjd(model.reference_epoch_mjd_tdb)),
             ("phase zero", _mjd(model.phase_zero_mjd_tdb or model.reference_epoch_mjd_tdb)
              + ("" if model.phase_zero_mjd_tdb is not None else " (the reference epoch)")),
             ("frequency", f"{model.frequency_hz} Hz")]
    for k, value in enumerate(model.frequency_derivatives, start=1):
        unit = "Hz/s" if k == 1 else f"Hz/s^{k}"
        rows.append((f"{_ORDINAL.get(k, f'{k}th')} frequency derivative", f"{value} {unit}"))
    window = model.validity
    rows.append(("validity", f"{_mjd(window.start_mjd_tdb)} to {_mjd(window.end_mjd_tdb)} "
                             f"({window.end_mjd_tdb - window.start_mjd_tdb} days)"))
    return [f"    {label:28s} {text}" for label, text in rows]


def derived_lines(model) -> list[str]:
    """The spin-down summary, each quantity with its unit once."""
    from ..core.spin import spin_down_summary

    summary = spin_down_summary(model)
    lines = []
    for key, label, unit in DERIVED:
        value = summary[key]
        if value is not None:
            lines.append(f"    {label:28s} {_shown(value)} {unit}".rstrip())
    fdot = model.frequency_derivatives[0] if model.frequency_derivatives else 0
    if fdot > 0:
        lines.append("    spinning up (frequency derivative > 0): the spin-down power is "
                     "negative and there is no characteristic age or dipole field")
    elif fdot == 0:
        lines.append("    no frequency derivative: no spin-down power, age or field")
    return lines


def summary_lines(model) -> list[str]:
    """The summary of a ``SpinModel`` as lines of text: inputs, derived, extras."""
    lines = [f"{model.model_id}: {model.target.name}", "  as written (exact decimals):",
             *input_lines(model), "  derived:", *derived_lines(model)]
    extras = []
    if model.glitches:
        extras.append(f"{len(model.glitches)} glitch(es)")
    if model.binary is not None:
        extras.append(f"binary orbit ({model.binary.kind})")
    if model.timing_noise is not None:
        extras.append(f"{len(model.timing_noise.sine_cycles)} timing-noise harmonics")
    if extras:
        lines.append("  also: " + ", ".join(extras))
    return lines


def summary_json(model) -> dict:
    """The summary as JSON types: inputs as exact decimal strings, derived as numbers."""
    from ..core.spin import spin_down_summary

    return {"model_id": model.model_id, "target": model.target.name,
            "inputs": model.model_dump(mode="json", exclude={"provenance"}),
            "derived": spin_down_summary(model)}
