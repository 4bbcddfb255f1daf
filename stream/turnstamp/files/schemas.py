"""Arrow schemas of everything turnstamp reads from the wire and writes to disk.

Each field carries its unit and meaning in the field metadata (``unit``,
``description``); ``turnstamp schemas --write schemas/`` exports them, with the
JSON Schemas of the configuration, spin-model, template and wire-header formats,
so that downstream tools need not read this code.

Instants are int64 nanoseconds since 2000-01-01T12:00:00 in the scale named in
the field name (``_tt_ns``, ``_tdb_ns``, ``_utc_ns`` for UTC labels).
"""

from __future__ import annotations

import pyarrow as pa

__all__ = ["EVENTS", "OUTPUTS", "field_docs"]

_STRING = pa.dictionary(pa.int32(), pa.string())


def _f(name, kind, description, unit="", nullable=False):
    meta = {"description": description}
    if unit:
        meta["unit"] = unit
    return pa.field(name, kind, nullable=nullable, metadata=meta)


EVENTS = pa.schema([
    _f("event_id", pa.uint64(), "event identifier, unique per source"),
    _f("time_ns", pa.int64(), "arrival time at the site in the header's time scale "
       "(UTC: labels, 86400 s per day)", "ns since 2000-01-01T12:00:00"),
    _f("energy_kev", pa.float64(), "reconstructed energy (optional)", "keV", True),
    _f("ra_deg", pa.float64(), "reconstructed right ascension, ICRS (optional)", "deg", True),
    _f("dec_deg", pa.float64(), "reconstructed declination, ICRS (optional)", "deg", True),
    _f("score", pa.float64(), "classifier score (optional)", "", True),
    _f("weight", pa.float64(), "photon weight >= 0 (optional)", "", True),
    _f("telescope_mask", pa.uint64(), "bit mask of telescopes (optional)", "", True),
], metadata={"description": "One message of the event stream: required event_id and "
             "time_ns, any of the optional columns."})

ARCHIVE = pa.schema([
    _f("event_id", pa.uint64(), "event identifier as received"),
    _f("source", _STRING, "event builder that sent the event"),
    _f("sequence", pa.uint64(), "sequence number of the message that carried it"),
    _f("target", _STRING, "target (pulsar) this row tags the event for"),
    _f("site_tt_ns", pa.int64(), "arrival time at the site after the clock chain",
       "ns since 2000-01-01T12:00:00 TT"),
    _f("barycentric_tdb_ns", pa.int64(), "arrival time at the solar-system barycentre, "
       "rounded to 1 ns", "ns since 2000-01-01T12:00:00 TDB"),
    _f("barycentric_correction_s", pa.float64(),
       "TDB(barycentre) - TT(site) plus clock remainders; exact barycentric instant is "
       "site_tt_ns + this", "s"),
    _f("phase", pa.float64(), "rotational phase in [0, 1)", "cycles"),
    _f("pulse_number", pa.int64(), "integer turns since the model's phase zero", "cycles"),
    _f("weight", pa.float64(), "photon weight (1 when the stream has none)"),
    _f("recipe_flags", pa.uint32(), "bit i set: the event passes the target's recipe i "
       "(order in the file metadata 'recipes')"),
    _f("model_id", _STRING, "spin model that tagged the event"),
    _f("quality_flags", pa.uint32(), "turnstamp.core.flags.Quality bits"),
])

SIGNIFICANCE = pa.schema([
    _f("computed_at_utc_ns", pa.int64(), "wall clock of the update", "ns UTC label"),
    _f("data_until_tt_ns", pa.int64(), "latest event time included", "ns TT"),
    _f("target", _STRING, "target"),
    _f("recipe", _STRING, "selection recipe"),
    _f("window", _STRING, "'cumulative' or a sliding window such as '5min'"),
    _f("window_s", pa.int64(), "window length (0 for cumulative)", "s"),
    _f("phase_reference", pa.string(), "fingerprint of the spin model's phase reference"),
    _f("events", pa.int64(), "events in the window"),
    _f("sum_weights", pa.float64(), "sum of weights (events when unweighted)"),
    _f("weighted", pa.bool_(), "statistics use photon weights (Kerr 2011)"),
    _f("h_statistic", pa.float64(), "H-test (de Jager et al. 1989), weighted if 'weighted'"),
    _f("h_harmonics", pa.int32(), "harmonics maximising H"),
    _f("h_log10_p", pa.float64(), "chance probability exp(-0.4 H) (de Jager & Buesching "
       "2010), log10"),
    _f("h_sigma", pa.float64(), "one-sided Gaussian equivalent of h_log10_p", "sigma"),
    _f("z2_statistic", pa.float64(), "Z^2_m (Buccheri et al. 1983) with m = z2_harmonics"),
    _f("z2_harmonics", pa.int32(), "m of the Z^2_m test"),
    _f("z2_sigma", pa.float64(), "one-sided Gaussian equivalent (chi^2 with 2m dof)",
       "sigma"),
    _f("rayleigh_statistic", pa.float64(), "Rayleigh test 2N R^2 (= Z^2_1)"),
    _f("rayleigh_sigma", pa.float64(), "one-sided Gaussian equivalent", "sigma"),
    _f("trials", pa.int32(), "independent (target, recipe) pairs watched"),
    _f("h_sigma_post_trials", pa.float64(), "h_sigma after the trials correction", "sigma"),
])

PROFILES = pa.schema([
    _f("computed_at_utc_ns", pa.int64(), "wall clock of the update", "ns UTC label"),
    _f("data_until_tt_ns", pa.int64(), "latest event time included", "ns TT"),
    _f("target", _STRING, "target"),
    _f("recipe", _STRING, "selection recipe"),
    _f("events", pa.int64(), "events folded"),
    _f("sum_weights", pa.float64(), "sum of weights"),
    _f("counts", pa.list_(pa.float64()), "weighted counts per phase bin (bins of equal "
       "width on [0, 1))"),
    _f("errors", pa.list_(pa.float64()), "sqrt(sum of squared weights) per bin"),
    _f("harmonics", pa.int32(), "harmonics in the Fourier estimate (H-test choice)"),
    _f("cos_moments", pa.list_(pa.float64()), "sum w cos(2 pi k phase) / sum w, k = 1..20"),
    _f("sin_moments", pa.list_(pa.float64()), "sum w sin(2 pi k phase) / sum w, k = 1..20"),
    _f("background_per_bin", pa.float64(), "unpulsed level from the Fourier estimate's "
       "minimum, weighted counts per bin"),
    _f("pulsed_fraction", pa.float64(), "1 - minimum of the normalised Fourier estimate"),
    _f("pulsed_fraction_rms", pa.float64(), "bias-corrected RMS pulsed fraction"),
    _f("peak_phase", pa.float64(), "phase of the Fourier estimate's maximum", "cycles"),
    _f("peak_phase_sigma", pa.float64(), "its 1-sigma uncertainty", "cycles"),
    _f("template_shift_cycles", pa.float64(), "data minus template phase offset (Taylor "
       "1992); positive = pulse late", "cycles", True),
    _f("template_shift_sigma_cycles", pa.float64(), "1-sigma", "cycles", True),
    _f("template_shift_us", pa.float64(), "template_shift_cycles / frequency", "us", True),
    _f("template_shift_sigma_us", pa.float64(), "1-sigma", "us", True),
    _f("template_amplitude", pa.float64(), "fitted pulsed amplitude relative to the "
       "template", "", True),
])

CLOCK = pa.schema([
    _f("computed_at_utc_ns", pa.int64(), "wall clock of the update", "ns UTC label"),
    _f("target", _STRING, "target"),
    _f("recipe", _STRING, "recipe used for the check"),
    _f("status", _STRING, "OK, WARN or FAIL"),
    _f("kind", _STRING, "diagnosis: none, offset, step, drift, wobble, smeared, "
       "no_signal, insufficient_signal, barycentre_sign, no_barycentre"),
    _f("summary", pa.string(), "the diagnosis with its numbers, one line per finding"),
    _f("tolerance_cycles", pa.float64(), "tolerance used", "cycles"),
    _f("verdict_json", pa.string(), "every number behind the verdict, as JSON"),
    _f("chunk_start_tt_ns", pa.list_(pa.int64()), "chunk starts", "ns TT"),
    _f("chunk_end_tt_ns", pa.list_(pa.int64()), "chunk ends", "ns TT"),
    _f("chunk_shift_cycles", pa.list_(pa.float64()), "template offset per chunk", "cycles"),
    _f("chunk_sigma_cycles", pa.list_(pa.float64()), "1-sigma per chunk", "cycles"),
    _f("chunk_detected", pa.list_(pa.bool_()), "pulse detected in the chunk"),
    _f("chunk_arrival_tdb_ns", pa.list_(pa.int64()), "barycentric arrival time of each "
       "chunk's pulse (the template's phase zero, shifted by the chunk's offset) nearest "
       "the chunk's midpoint; null without an offset", "ns since 2000-01-01T12:00:00 TDB"),
    _f("chunk_arrival_sigma_us", pa.list_(pa.float64()), "1-sigma of each arrival time",
       "us"),
])

REJECTS = pa.schema([
    _f("received_utc_ns", pa.int64(), "wall clock on receipt", "ns UTC label"),
    _f("source", pa.string(), "source from the header, if it could be read", nullable=True),
    _f("sequence", pa.uint64(), "sequence number, if it could be read", nullable=True),
    _f("event_id", pa.uint64(), "the refused event (null for a whole message)",
       nullable=True),
    _f("time_ns", pa.int64(), "the refused event's time as received", "ns", True),
    _f("reason", _STRING, "turnstamp.errors.RejectReason code"),
    _f("detail", pa.string(), "what was wrong, naming the field and value"),
    _f("events", pa.int64(), "events this row accounts for (0 if unknown)"),
    _f("message_bytes", pa.int64(), "size of the message", "bytes"),
])

LEDGER = pa.schema([
    _f("received_utc_ns", pa.int64(), "wall clock on receipt", "ns UTC label"),
    _f("source", _STRING, "event builder (null if the header was unreadable)", nullable=True),
    _f("sequence", pa.uint64(), "message sequence number (null if unreadable)", nullable=True),
    _f("outcome", _STRING, "'accepted', or the reason the whole message was refused"),
    _f("events", pa.int64(), "events in the message (0 if unknown)"),
    _f("tagged", pa.int64(), "events written to the archive"),
    _f("filtered", pa.int64(), "valid events outside every target's selection"),
    _f("rejected", pa.int64(), "events refused (see rejects)"),
    _f("missing_before", pa.int64(), "messages missing from the sequence before this one"),
    _f("first_tt_ns", pa.int64(), "earliest accepted event", "ns TT", True),
    _f("last_tt_ns", pa.int64(), "latest accepted event", "ns TT", True),
])

OUTPUTS = {
    "archive": ARCHIVE,
    "significance": SIGNIFICANCE,
    "profiles": PROFILES,
    "clock": CLOCK,
    "rejects": REJECTS,
    "ledger": LEDGER,
}
"""Output streams written by the service, by file stem."""


def field_docs(schema: pa.Schema) -> list[dict[str, str]]:
    """Name, type, unit and description of every field (for docs and JSON export)."""
    rows = []
    for field in schema:
        meta = {k.decode(): v.decode() for k, v in (field.metadata or {}).items()}
        rows.append({"name": field.name, "type": str(field.type), "nullable": field.nullable,
                     "unit": meta.get("unit", ""), "description": meta.get("description", "")})
    return rows
