"""``turnstamp model``: check spin-model files, or print their spin-down summary.

``model check`` validates each file; ``model summary`` prints the spin-down
summary of each model: period, period derivative, spin-down power,
characteristic age, surface dipole field, braking index and validity window.
"""

from __future__ import annotations

__all__ = ["add_parser", "run", "UNITS"]

UNITS = {"frequency_hz": "Hz", "period_s": "s", "period_derivative": "s/s",
         "spin_down_power_erg_per_s": "erg/s", "characteristic_age_yr": "yr",
         "surface_dipole_field_gauss": "G", "braking_index": "",
         "valid_from_mjd_tdb": "MJD (TDB)", "valid_until_mjd_tdb": "MJD (TDB)"}
"""Unit printed after each quantity of the spin-down summary."""


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("model", help="check spin models or print their spin-down summary")
    p.add_argument("action", choices=["summary", "check"],
                   help="summary: period, period derivative, spin-down power, characteristic "
                        "age, surface field, braking index, validity; check: validate only")
    p.add_argument("models", nargs="+", help="spin model files (TOML/JSON)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..files.inputs import load_spin_model

    for path in args.models:
        model = load_spin_model(path)
        if args.action == "check":
            print(f"{path}: ok ({model.model_id}, phase reference {model.phase_reference_key()})")
        else:
            print("\n".join(summary_lines(model)))
    return 0


def _shown(value) -> str:
    if value is None:
        return "n/a"
    return f"{value:.10g}" if isinstance(value, float) else str(value)


def summary_lines(model) -> list[str]:
    """The spin-down summary of a ``SpinModel`` as lines of text."""
    from ..core.spin import spin_down_summary

    target = model.target
    lines = [f"{model.model_id}: {target.name} "
             f"(ra {target.right_ascension_deg} deg, dec {target.declination_deg} deg)"]
    for key, value in spin_down_summary(model).items():
        lines.append(f"  {key.replace('_', ' '):32s} {_shown(value)} {UNITS.get(key, '')}")
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
