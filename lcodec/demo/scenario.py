"""The demo scenario: the invented Vantrel Highland Sensing Network's sites, stations,
devices and relays, and the libm-free arithmetic and time stamps every demo file uses
(see demo/corpus.py for the scenario and the determinism rules)."""
from __future__ import annotations

import random
from dataclasses import dataclass, field
from datetime import datetime, timedelta

DEFAULT_SEED = 7301
TEST_FRACTION = 0.2
MANIFEST_NAME = "manifest.tsv"
NETWORK = "VHSN"
FRAME_S = 1800  # a gateway seals and sends one frame of samples every FRAME_S seconds

# ---------------------------------------------------------------------------
# Arithmetic-only helpers (deterministic on every IEEE-754 machine)
# ---------------------------------------------------------------------------

PI = 3.141592653589793
HALF_PI = PI / 2.0
TWO_PI = 2.0 * PI
SQRT3 = 1.7320508075688772


def sin_(x: float) -> float:
    """sin(x) from a Taylor polynomial after range reduction; uses only + - * /."""
    k = round(x / TWO_PI)
    r = x - k * TWO_PI
    if r > HALF_PI:
        r = PI - r
    elif r < -HALF_PI:
        r = -PI - r
    r2 = r * r
    return r * (1.0 + r2 * (-1.0 / 6 + r2 * (1.0 / 120 + r2 * (-1.0 / 5040 + r2 * (
        1.0 / 362880 + r2 * (-1.0 / 39916800 + r2 * (1.0 / 6227020800)))))))


def cos_(x: float) -> float:
    return sin_(x + HALF_PI)


def gauss_(rng: random.Random) -> float:
    """Approximately standard normal: sum of four uniforms, centred and scaled."""
    return (rng.random() + rng.random() + rng.random() + rng.random() - 2.0) * SQRT3


def clip(x: float, lo: float, hi: float) -> float:
    return lo if x < lo else hi if x > hi else x


def hexstr(rng: random.Random, n_hex: int) -> str:
    return format(rng.getrandbits(4 * n_hex), "0%dx" % n_hex)


# ---------------------------------------------------------------------------
# Time: integer seconds (or milliseconds) from the season start, printed by hand
# ---------------------------------------------------------------------------

EPOCH = datetime(2031, 11, 1)  # start of the (invented) winter season, UTC
DAY = 86400


def _dt(t_s: float) -> datetime:
    return EPOCH + timedelta(milliseconds=int(round(t_s * 1000)))


def iso_s(t_s: float) -> str:
    d = _dt(t_s)
    return "%04d-%02d-%02dT%02d:%02d:%02dZ" % (d.year, d.month, d.day, d.hour, d.minute, d.second)


def iso_ms(t_s: float) -> str:
    d = _dt(t_s)
    return "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ" % (
        d.year, d.month, d.day, d.hour, d.minute, d.second, d.microsecond // 1000)


def log_stamp(t_s: float) -> str:
    d = _dt(t_s)
    return "%04d-%02d-%02d %02d:%02d:%02d.%03d" % (
        d.year, d.month, d.day, d.hour, d.minute, d.second, d.microsecond // 1000)


def day_str(t_s: float) -> str:
    d = _dt(t_s)
    return "%04d-%02d-%02d" % (d.year, d.month, d.day)


def file_stamp(t_s: float) -> str:
    d = _dt(t_s)
    return "%04d%02d%02dT%02d%02dZ" % (d.year, d.month, d.day, d.hour, d.minute)


# ---------------------------------------------------------------------------
# The invented network
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Site:
    code: str
    name: str
    altitude_m: int
    p_base_hpa: float  # see note below the table
    grid_ref: str
    seismic: bool
    relay: str
    interval_s: int
    wind_mean: float
    prevailing_deg: int


# p_base_hpa: mean pressure at the site's altitude from the standard-atmosphere formula
# p = 1013.25 * (1 - 2.25577e-5 * h) ** 5.25588 (formula recalled from memory),
# evaluated once when this table was written and stored, so no pow() runs here.
SITES = (
    Site("VH01", "Skarvold Col", 3120, 690.5, "VG 4412 7180", True, "rly-1", 600, 7.5, 285),
    Site("VH02", "Ebrin Summit", 3480, 659.3, "VG 4530 7302", False, "rly-1", 600, 10.5, 300),
    Site("VH03", "Tarnhaugh", 2890, 710.9, "VG 4821 7730", True, "rly-2", 300, 5.0, 250),
    Site("VH04", "Cold Lantern Saddle", 3055, 696.2, "VG 4790 7455", False, "rly-2", 600, 8.0, 270),
    Site("VH05", "Orrin Spur", 3310, 673.9, "VG 5012 7611", True, "rly-2", 600, 9.0, 290),
    Site("VH06", "Glasvik Needle", 3690, 641.7, "VG 5204 7388", False, "rly-3", 300, 12.0, 310),
    Site("VH07", "Brannoch Pass", 2760, 722.7, "VG 5377 7902", True, "rly-3", 600, 6.5, 200),
    Site("VH08", "Ysolde Plateau", 2980, 702.9, "VG 5440 7620", False, "rly-3", 600, 6.0, 265),
    Site("VH09", "Hask Tor", 3205, 683.0, "VG 4655 7045", True, "rly-1", 600, 8.5, 280),
    Site("VH10", "Meridel Cirque", 3390, 667.0, "VG 4968 7850", False, "rly-2", 300, 7.0, 240),
    Site("VH11", "Fenwarrow Ridge", 2840, 715.5, "VG 5281 7199", True, "rly-3", 600, 7.5, 295),
    Site("VH12", "Øvre Quillon", 3550, 653.4, "VG 5108 7024", False, "rly-1", 600, 11.0, 305),
)

RELAYS = {
    "rly-1": ("Lornach Tower", ("VH01", "VH02", "VH09", "VH12")),
    "rly-2": ("Kettle Knoll", ("VH03", "VH04", "VH05", "VH10")),
    "rly-3": ("Ashfall Shoulder", ("VH06", "VH07", "VH08", "VH11")),
}

OPERATORS = (
    ("i.marrak", "Ilse Marrák"),
    ("h.mense", "Halvard Mense"),
    ("t.quell", "Tomas Quell"),
    ("r.sover", "Ridna Sover"),
    ("o.venn", "Oskar Venn"),
    ("y.tillet", "Yara Tillet"),
    ("b.ferrant", "Bo Ferrant"),
    ("s.okoro-blum", "Sanne Okoro-Blum"),
)

# role, id prefix, model (invented vendors), firmware versions oldest..newest
DEVICE_TYPES = (
    ("logger", "DL", "Tessik DL-40", ("4.1.9", "4.2.6", "4.2.7")),
    ("gateway", "GW", "Tessik GW-7", ("2.3.0", "2.3.4", "2.4.1")),
    ("wind", "AN", "Keswa A3 sonic", ("1.8.2", "1.9.0")),
    ("thermohygro", "TH", "Mirrow HT-12", ("3.0.5",)),
    ("baro", "PB", "Mirrow PB-5", ("3.1.1", "3.1.2")),
    ("snow", "SR", "Brask USR-9", ("0.9.14", "0.9.15")),
    ("radiation", "RD", "Aurel PR-2", ("1.2.0",)),
    ("power", "PC", "Tessik PC-2", ("5.0.3", "5.1.0")),
    ("seismo", "SM", "Kolva BB-3", ("7.4.2", "7.5.0")),
)


@dataclass
class Device:
    role: str
    dev_id: str
    model: str
    fw_old: str
    fw_new: str
    upgrade_s: float | None  # None: no upgrade this season

    def fw(self, t_s: float) -> str:
        if self.upgrade_s is not None and t_s >= self.upgrade_s:
            return self.fw_new
        return self.fw_old


@dataclass
class Station:
    site: Site
    devices: dict = field(default_factory=dict)
    t_base: float = 0.0
    commissioned_s: float = 0.0
    primary: str = ""
    backup: str = ""
    battery_ah: int = 0
    panel_wp: int = 0
    gust_limit: float = 0.0

    @property
    def code(self) -> str:
        return self.site.code

    @property
    def low(self) -> str:
        return self.site.code.lower()


def build_station(seed: int, site: Site) -> Station:
    rng = random.Random("%d:site:%s" % (seed, site.code))
    st = Station(site=site)
    for role, prefix, model, track in DEVICE_TYPES:
        if role == "seismo" and not site.seismic:
            continue
        dev_id = "%s-%04X-%04d" % (prefix, rng.randrange(0x1000, 0x10000), rng.randrange(100, 2000))
        if len(track) > 1 and rng.random() < 0.6:
            old, new = track[-2], track[-1]
            upgrade = rng.randrange(2, 40) * DAY + rng.randrange(6 * 3600, 16 * 3600)
        else:
            old = new = track[-1] if rng.random() < 0.7 else track[0]
            upgrade = None
        st.devices[role] = Device(role, dev_id, model, old, new, upgrade)
    st.t_base = -3.5 - (site.altitude_m - 2700) / 160.0
    st.commissioned_s = -rng.randrange(3 * 365, 6 * 365) * DAY
    ops = rng.sample(range(len(OPERATORS)), 2)
    st.primary, st.backup = OPERATORS[ops[0]][0], OPERATORS[ops[1]][0]
    st.battery_ah = rng.choice((160, 220, 220, 300))
    st.panel_wp = rng.choice((2 * 120, 2 * 140, 3 * 140))
    st.gust_limit = float(rng.choice((25, 28, 30, 32)))
    return st


def build_network(seed: int) -> list:
    return [build_station(seed, s) for s in SITES]


# ---------------------------------------------------------------------------
# Telemetry CSV
# ---------------------------------------------------------------------------
