"""The setup description: one TOML file per setup, ``profiles/<name>/setup.toml``.

A setup says what the apparatus is (trap, detector, electrodes, vacuum) and the
limits that the device classes enforce before anything moves. Values may carry
units (``"0.3 W"``, ``"1e-8 mbar"``); the loader converts them to SI and refuses
unknown keys, missing keys, wrong units and out-of-range values with one line
naming the file, the key, the value, what is allowed and what to do.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from .._errors import InputError
from ._units import parse_quantity

__all__ = [
    "ParticleSpec",
    "TrapSpec",
    "DetectorSpec",
    "ElectrodeSpec",
    "GaugeSpec",
    "VacuumSpec",
    "LimitSpec",
    "MonitorSpec",
    "DataSpec",
    "Setup",
    "load_setup",
    "setup_from_dict",
]

GAUGE_KINDS = ("thermal_conductivity", "ionization", "capacitance_diaphragm")


@dataclass(frozen=True)
class ParticleSpec:
    """Nominal particle (for a sim setup: the simulation's truth).

    radius in m, density in kg/m**3, charge in elementary charges.
    """

    radius: float
    density: float
    charge_e: int


@dataclass(frozen=True)
class TrapSpec:
    """Optical trap: wavelength (m), waist (m), power (W), mode frequencies x, y, z (Hz),
    the pressure below which an undamped particle is lost (Pa) and the trap depth (K)."""

    wavelength: float
    waist: float
    power: float
    frequencies: tuple[float, float, float]
    loss_pressure: float
    trap_depth: float


@dataclass(frozen=True)
class DetectorSpec:
    """Motion detector: sample rate (Hz), record length (samples), calibration x, y, z
    (V/m, nominal), imprecision (m/sqrt(Hz)), crosstalk (3x3, dimensionless), ADC range
    (+-V) and bits, heterodyne carrier (Hz) and local-oscillator offset sign (+1/-1)."""

    sample_rate: float
    record_length: int
    calibration: tuple[float, float, float]
    imprecision: float
    crosstalk: tuple[tuple[float, float, float], ...]
    adc_range: float
    adc_bits: int
    heterodyne_carrier: float
    lo_sign: int


@dataclass(frozen=True)
class ElectrodeSpec:
    """Feedback electrodes: gap (m), geometry factor kappa (field = kappa V/d), loop delay (s)."""

    distance: float
    geometry_factor: float
    loop_delay: float


@dataclass(frozen=True)
class GaugeSpec:
    """One vacuum gauge: name, kind, range (Pa) and stated accuracy (fraction of reading)."""

    name: str
    kind: str
    range_min: float
    range_max: float
    accuracy: float


@dataclass(frozen=True)
class VacuumSpec:
    """Chamber: gas species, base pressure (Pa), start pressure (Pa), gauges."""

    gas: str
    base_pressure: float
    start_pressure: float
    gauges: tuple[GaugeSpec, ...]


@dataclass(frozen=True)
class LimitSpec:
    """Limits enforced in code before any device moves (SI units)."""

    laser_power_max: float
    electrode_voltage_max: float
    feedback_gain_max: float
    modulation_depth_max: float
    pressure_min: float
    pressure_max: float
    sample_rate_max: float
    record_length_max: int


@dataclass(frozen=True)
class MonitorSpec:
    """What the unattended-safety monitors watch and do (SI units; ``[monitors]``).

    ``intensity_min`` (V): below it on the detector's intensity channel the particle is
    taken as lost (0: only the fits' motional peaks are watched). ``pressure_band``: the
    gauge reading must stay within [P/band, P*band] of the step's pressure P.
    ``pressure_timeout`` (s) of lab time, then ``pressure_policy`` (wait, skip, stop).
    ``saturation_fraction``: the largest fraction of a record the electrode drive may
    sit at its limit; ``saturation_action`` (suspend: the record is left out and the
    step goes on; end: the step's run ends). ``safe_feedback`` (keep, off) and
    ``safe_laser_power`` (W; 0: unchanged) define the safe state after a particle loss.
    ``poll_interval`` (s) of lab time between reads while a condition is waited out.
    """

    intensity_min: float = 0.0
    pressure_band: float = 3.0
    pressure_timeout: float = 600.0
    pressure_policy: str = "stop"
    saturation_fraction: float = 0.05
    saturation_action: str = "suspend"
    safe_feedback: str = "off"
    safe_laser_power: float = 0.0
    poll_interval: float = 5.0


@dataclass(frozen=True)
class DataSpec:
    """Where the setup's runs go (``[data]``; not part of the setup's sha256).

    ``store``: ``embedded`` (default: a catalog of its own in the data directory) or
    ``server`` (the lab's shared tiled server at ``uri``). ``api_key_env`` names the
    environment variable that holds the server's API key (the key itself is never
    written into a profile). ``raw_dir``: the local folder the setup writes its HDF5
    traces into (default: ``DATA_DIR/raw``); ``server_raw_dir``: the same folder as
    the server sees it (default: the same path); ``raw_transfer``: ``shared`` (the
    server reads the folder itself, e.g. a network mount) or ``synced`` (a sync tool
    copies it there later: until a file arrives, its run is listed but reading its
    traces fails). ``allow_unauthenticated``: write to a server that asks for no key.
    ``supersedes``: the first 12 hex digits of the setup sha256 this profile replaces
    under the same setup name in the shared catalog (see the README, "Lab deployment").
    """

    store: str = "embedded"
    uri: str = ""
    api_key_env: str = ""
    raw_dir: str = ""
    server_raw_dir: str = ""
    raw_transfer: str = "shared"
    allow_unauthenticated: bool = False
    supersedes: str = ""


@dataclass(frozen=True)
class Setup:
    """A parsed setup description (SI units throughout).

    ``particle_id`` names the trapped particle (``[particle] id``; recorded as
    ``particle`` in every run) and ``data`` says where runs go (``[data]``); neither is
    part of :meth:`as_dict` or :attr:`sha256`, which describe the apparatus only.
    """

    name: str
    lab: str
    kind: str
    description: str
    temperature: float
    particle: ParticleSpec
    trap: TrapSpec
    detector: DetectorSpec
    electrodes: ElectrodeSpec
    vacuum: VacuumSpec
    limits: LimitSpec
    seed: int | None = None
    monitors: MonitorSpec = field(default_factory=MonitorSpec)
    source: str = field(default="<dict>", compare=False)
    particle_id: str = field(default="", compare=False)
    data: DataSpec = field(default_factory=DataSpec, compare=False)

    def as_dict(self) -> dict[str, Any]:
        """Plain-JSON form (SI values), as stored in every run's start document."""
        d = asdict(self)
        for key in ("source", "particle_id", "data"):
            d.pop(key)
        return json.loads(json.dumps(d))

    @property
    def sha256(self) -> str:
        """SHA-256 of the canonical JSON of :meth:`as_dict` (identifies the setup exactly)."""
        text = json.dumps(self.as_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()


# --- parsing ---------------------------------------------------------------

_KNOWN_KEYS: dict[str, tuple[str, ...]] = {
    "setup": ("name", "lab", "kind", "description", "temperature", "seed"),
    "particle": ("id", "radius", "density", "charge_e"),
    "trap": ("wavelength", "waist", "power", "frequencies", "loss_pressure", "trap_depth"),
    "detector": ("sample_rate", "record_length", "calibration", "imprecision", "crosstalk",
                 "adc_range", "adc_bits", "heterodyne_carrier", "lo_sign"),
    "electrodes": ("distance", "geometry_factor", "loop_delay"),
    "vacuum": ("gas", "base_pressure", "start_pressure", "gauges"),
    "vacuum.gauges": ("name", "kind", "range_min", "range_max", "accuracy"),
    "monitors": ("intensity_min", "pressure_band", "pressure_timeout", "pressure_policy",
                 "saturation_fraction", "saturation_action", "safe_feedback",
                 "safe_laser_power", "poll_interval"),
    "limits": ("laser_power_max", "electrode_voltage_max", "feedback_gain_max",
               "modulation_depth_max", "pressure_min", "pressure_max", "sample_rate_max",
               "record_length_max"),
    "data": ("store", "uri", "api_key_env", "raw_dir", "server_raw_dir", "raw_transfer",
             "allow_unauthenticated", "supersedes"),
}


class _Section:
    """Reads one TOML table, remembering which keys were used, for clear errors."""

    def __init__(self, data: dict[str, Any], name: str, source: str) -> None:
        if not isinstance(data, dict):
            raise InputError(f"{source}: [{name}] must be a table; fix the file")
        self.data, self.name, self.source = data, name, source
        self.used: set[str] = set()
        known = _KNOWN_KEYS[name.split("[")[0]]
        for key in data:
            if key not in known:
                raise InputError(f"{self.where(key)} is not a known key; allowed keys are "
                                 f"{', '.join(known)}; fix the spelling or remove it")

    def where(self, key: str) -> str:
        return f"{self.source}: [{self.name}] {key}"

    def raw(self, key: str, default: Any = ...) -> Any:
        self.used.add(key)
        if key not in self.data:
            if default is ...:
                raise InputError(f"{self.where(key)} is missing; add it to the file")
            return default
        return self.data[key]

    def quantity(self, key: str, kind: str, *, lo: float = 0.0, hi: float = math.inf,
                 default: Any = ..., lo_open: bool = True) -> float:
        v = self.raw(key, default)
        x = parse_quantity(v, kind, self.where(key))
        bad = (x <= lo if lo_open else x < lo) or x > hi or not math.isfinite(x)
        if bad:
            op = ">" if lo_open else ">="
            raise InputError(f"{self.where(key)} = {v!r} is out of range; allowed {op} {lo:g}"
                             f" and <= {hi:g} (SI units); fix the file")
        return x

    def integer(self, key: str, *, lo: int, hi: int, default: Any = ...) -> int:
        v = self.raw(key, default)
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise InputError(f"{self.where(key)} = {v!r}: expected an integer from {lo} to {hi};"
                             " fix the file")
        return v

    def text(self, key: str, default: Any = ..., choices: tuple[str, ...] | None = None) -> str:
        v = self.raw(key, default)
        if not isinstance(v, str) or (choices is not None and v not in choices):
            allowed = f"one of {', '.join(choices)}" if choices else "a string"
            raise InputError(f"{self.where(key)} = {v!r}: expected {allowed}; fix the file")
        return v

    def triple(self, key: str, kind: str) -> tuple[float, float, float]:
        v = self.raw(key)
        if not isinstance(v, list) or len(v) != 3:
            raise InputError(f"{self.where(key)} = {v!r}: expected a list of 3 values [x, y, z];"
                             " fix the file")
        out = tuple(parse_quantity(item, kind, f"{self.where(key)}[{i}]") for i, item in
                    enumerate(v))
        if any(not (x > 0 and math.isfinite(x)) for x in out):
            raise InputError(f"{self.where(key)} = {v!r}: every value must be > 0; fix the file")
        return out  # type: ignore[return-value]

    def finish(self) -> None:
        # every key of the table above must have been read by the parser
        unread = set(self.data) - self.used
        assert not unread, f"parser did not read {sorted(unread)} of [{self.name}]"


def setup_from_dict(data: dict[str, Any], source: str = "<dict>") -> Setup:
    """Build a :class:`Setup` from the parsed TOML ``data``; ``source`` names it in errors."""
    known = ("setup", "particle", "trap", "detector", "electrodes", "vacuum", "limits")
    optional = ("monitors", "data")
    for name in data:
        if name in optional:
            continue
        if name not in known:
            raise InputError(f"{source}: [{name}] is not a known section; allowed sections are "
                             f"{', '.join(known + optional)}; fix the spelling or remove it")
    sections = {}
    for name in known:
        if name not in data:
            raise InputError(f"{source}: section [{name}] is missing; add it to the file")
        sections[name] = _Section(data[name], name, source)
    s, p, t, d = sections["setup"], sections["particle"], sections["trap"], sections["detector"]
    e, v, lim = sections["electrodes"], sections["vacuum"], sections["limits"]

    limits = LimitSpec(
        laser_power_max=lim.quantity("laser_power_max", "power"),
        electrode_voltage_max=lim.quantity("electrode_voltage_max", "voltage"),
        feedback_gain_max=lim.quantity("feedback_gain_max", "rate"),
        modulation_depth_max=lim.quantity("modulation_depth_max", "dimensionless", lo=0.0,
                                          hi=0.99, lo_open=False),
        pressure_min=lim.quantity("pressure_min", "pressure"),
        pressure_max=lim.quantity("pressure_max", "pressure"),
        sample_rate_max=lim.quantity("sample_rate_max", "frequency"),
        record_length_max=lim.integer("record_length_max", lo=2**10, hi=2**26),
    )
    if limits.pressure_min >= limits.pressure_max:
        raise InputError(f"{lim.where('pressure_min')} must be below pressure_max; fix the file")

    particle = ParticleSpec(
        radius=p.quantity("radius", "length", hi=10e-6),
        density=p.quantity("density", "density", hi=25e3),
        charge_e=p.integer("charge_e", lo=-10_000, hi=10_000),
    )
    trap = TrapSpec(
        wavelength=t.quantity("wavelength", "length", lo=100e-9, hi=20e-6),
        waist=t.quantity("waist", "length", lo=100e-9, hi=1e-3),
        power=t.quantity("power", "power", hi=limits.laser_power_max),
        frequencies=t.triple("frequencies", "frequency"),
        loss_pressure=t.quantity("loss_pressure", "pressure"),
        trap_depth=t.quantity("trap_depth", "temperature"),
    )
    crosstalk = d.raw("crosstalk", [[1, 0, 0], [0, 1, 0], [0, 0, 1]])
    if (not isinstance(crosstalk, list) or len(crosstalk) != 3
            or any(not isinstance(r, list) or len(r) != 3 for r in crosstalk)
            or any(isinstance(c, bool) or not isinstance(c, int | float) for r in crosstalk
                   for c in r)):
        raise InputError(f"{d.where('crosstalk')} = {crosstalk!r}: expected a 3x3 list of "
                         "numbers (rows: channels x, y, z; columns: motion x, y, z); fix the file")
    lo_sign = d.integer("lo_sign", lo=-1, hi=1, default=1)
    if lo_sign == 0:
        raise InputError(f"{d.where('lo_sign')} = 0: expected +1 or -1; fix the file")
    detector = DetectorSpec(
        sample_rate=d.quantity("sample_rate", "frequency", hi=limits.sample_rate_max),
        record_length=d.integer("record_length", lo=2**10, hi=limits.record_length_max),
        calibration=d.triple("calibration", "calibration"),
        imprecision=d.quantity("imprecision", "amplitude_density"),
        crosstalk=tuple(tuple(float(c) for c in r) for r in crosstalk),
        adc_range=d.quantity("adc_range", "voltage"),
        adc_bits=d.integer("adc_bits", lo=8, hi=24),
        heterodyne_carrier=d.quantity("heterodyne_carrier", "frequency", default="0 Hz",
                                      lo=0.0, lo_open=False),
        lo_sign=lo_sign,
    )
    electrodes = ElectrodeSpec(
        distance=e.quantity("distance", "length"),
        geometry_factor=e.quantity("geometry_factor", "dimensionless", hi=10.0),
        loop_delay=e.quantity("loop_delay", "time", lo=0.0, lo_open=False, hi=1e-3),
    )
    gauges_raw = v.raw("gauges")
    if not isinstance(gauges_raw, list) or not gauges_raw:
        raise InputError(f"{v.where('gauges')}: expected at least one [[vacuum.gauges]] table;"
                         " fix the file")
    gauges = []
    for i, g in enumerate(gauges_raw):
        gs = _Section(g, f"vacuum.gauges[{i}]", source)
        gauge = GaugeSpec(
            name=gs.text("name"),
            kind=gs.text("kind", choices=GAUGE_KINDS),
            range_min=gs.quantity("range_min", "pressure"),
            range_max=gs.quantity("range_max", "pressure"),
            accuracy=gs.quantity("accuracy", "dimensionless", hi=1.0),
        )
        if gauge.range_min >= gauge.range_max:
            raise InputError(f"{gs.where('range_min')} must be below range_max; fix the file")
        gs.finish()
        gauges.append(gauge)
    from ..physics import GASES

    vacuum = VacuumSpec(
        gas=v.text("gas", choices=tuple(GASES)),
        base_pressure=v.quantity("base_pressure", "pressure"),
        start_pressure=v.quantity("start_pressure", "pressure", hi=limits.pressure_max),
        gauges=tuple(gauges),
    )
    seed = s.raw("seed", None)
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int) or seed < 0):
        raise InputError(f"{s.where('seed')} = {seed!r}: expected a non-negative integer; "
                         "fix the file")
    mon_sec = _Section(data.get("monitors", {}), "monitors", source)
    d0 = MonitorSpec()
    monitors = MonitorSpec(
        intensity_min=mon_sec.quantity("intensity_min", "voltage", lo=0.0, lo_open=False,
                                       default=d0.intensity_min),
        pressure_band=mon_sec.quantity("pressure_band", "dimensionless", lo=1.0, hi=1e3,
                                       default=d0.pressure_band),
        pressure_timeout=mon_sec.quantity("pressure_timeout", "time",
                                          default=d0.pressure_timeout),
        pressure_policy=mon_sec.text("pressure_policy", default=d0.pressure_policy,
                                     choices=("wait", "skip", "stop")),
        saturation_fraction=mon_sec.quantity("saturation_fraction", "dimensionless", hi=1.0,
                                             default=d0.saturation_fraction),
        saturation_action=mon_sec.text("saturation_action", default=d0.saturation_action,
                                       choices=("suspend", "end")),
        safe_feedback=mon_sec.text("safe_feedback", default=d0.safe_feedback,
                                   choices=("keep", "off")),
        safe_laser_power=mon_sec.quantity("safe_laser_power", "power", lo=0.0, lo_open=False,
                                          hi=limits.laser_power_max,
                                          default=d0.safe_laser_power),
        poll_interval=mon_sec.quantity("poll_interval", "time", hi=3600.0,
                                       default=d0.poll_interval),
    )
    mon_sec.finish()
    data_spec = _data_spec(_Section(data.get("data", {}), "data", source))
    particle_id = p.text("id", default=f"{s.text('name')}-unnamed")
    if not particle_id.strip() or len(particle_id) > 200:
        raise InputError(f"{p.where('id')} = {particle_id!r}: expected a short non-empty name "
                         "of the trapped particle; fix the file")
    setup = Setup(
        name=s.text("name"),
        lab=s.text("lab", default=""),
        kind=s.text("kind", choices=("sim", "hardware")),
        description=s.text("description", default=""),
        temperature=s.quantity("temperature", "temperature", default="295 K", hi=1000.0),
        particle=particle,
        trap=trap,
        detector=detector,
        electrodes=electrodes,
        vacuum=vacuum,
        limits=limits,
        seed=seed,
        monitors=monitors,
        source=source,
        particle_id=particle_id,
        data=data_spec,
    )
    for sec in sections.values():
        sec.finish()
    return setup


def _data_spec(sec: _Section) -> DataSpec:
    store = sec.text("store", default="embedded", choices=("embedded", "server"))
    uri = sec.text("uri", default="")
    key_env = sec.text("api_key_env", default="")
    allow = sec.raw("allow_unauthenticated", False)
    if not isinstance(allow, bool):
        raise InputError(f"{sec.where('allow_unauthenticated')} = {allow!r}: expected true or "
                         "false; fix the file")
    spec = DataSpec(
        store=store, uri=uri.rstrip("/"), api_key_env=key_env,
        raw_dir=sec.text("raw_dir", default=""),
        server_raw_dir=sec.text("server_raw_dir", default=""),
        raw_transfer=sec.text("raw_transfer", default="shared", choices=("shared", "synced")),
        allow_unauthenticated=allow,
        supersedes=sec.text("supersedes", default="").lower(),
    )
    sec.finish()
    if store == "embedded":
        extra = [k for k in sec.data if k != "store"]
        if extra:
            raise InputError(f"{sec.where(extra[0])}: only used with store = \"server\"; add "
                             "store = \"server\" or remove the key")
        return spec
    if not uri.startswith(("http://", "https://")):
        raise InputError(f"{sec.where('uri')} = {uri!r}: expected the catalog server's address, "
                         "http://HOST:PORT or https://HOST:PORT; fix the file")
    if "@" in uri.split("//", 1)[1].split("/", 1)[0] or "api_key" in uri:
        raise InputError(f"{sec.where('uri')}: holds a credential; write only the address and "
                         "name the key's environment variable in api_key_env")
    if key_env and not key_env.replace("_", "").isalnum():
        raise InputError(f"{sec.where('api_key_env')} = {key_env!r}: expected the NAME of an "
                         "environment variable (letters, digits, _), not the key; fix the file")
    if not key_env and not allow:
        raise InputError(f"{sec.where('api_key_env')} is missing: name the environment variable "
                         "that holds the server's API key (or, for a server without "
                         "authentication, set allow_unauthenticated = true)")
    if spec.supersedes and (len(spec.supersedes) < 12 or any(
            c not in "0123456789abcdef" for c in spec.supersedes)):
        raise InputError(f"{sec.where('supersedes')} = {spec.supersedes!r}: expected at least "
                         "12 hex digits of the setup sha256 this profile replaces; fix the file")
    for key in ("raw_dir", "server_raw_dir"):
        value = getattr(spec, key)
        if value and not Path(value).expanduser().is_absolute():
            raise InputError(f"{sec.where(key)} = {value!r}: expected an absolute path; "
                             "fix the file")
    return spec


def load_setup(path: str | Path) -> Setup:
    """Load ``path`` (a ``setup.toml`` or a profile folder holding one).

    Raises
    ------
    InputError
        Missing or unreadable file, TOML syntax error, or any bad key or value.
    """
    p = Path(path)
    if p.is_dir():
        p = p / "setup.toml"
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{p}: no such setup file; give a profile folder holding setup.toml "
                         "(see profiles/)") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read the setup file ({exc.strerror}); check the path "
                         "and its permissions") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: not valid TOML ({exc}); fix the file") from None
    return setup_from_dict(data, str(p))
