#!/usr/bin/env python3
"""Deterministic demo corpus: the records of an invented mountain sensing network.

Scenario (invented for this project, not based on any real network): the Vantrel
Highland Sensing Network (VHSN) runs twelve unattended stations on the ridges above the
fictional valley town of Lornach; all of them log weather, six also carry a broadband
seismometer. Stations send telemetry, event records and service logs over three radio
relays to an operations desk, and field teams keep a profile and visit reports per site.

Kinds of file written (all text, UTF-8, '\\n' line ends):

  telemetry    CSV, one row per sample (5 or 10 min), slowly drifting sensor values
  events       JSON lines, one record per event, nested fields, kind-specific payloads
  gateway_log  service log of a station gateway: severities, repeated message templates
  relay_log    traffic log of a radio relay, another line layout
  waveform     CSV of integer seismometer counts (100 Hz, three components)
  profile      INI-like station profile with calibration tables and a maintenance list
  visits       plain-text field visit reports

Usage:  python corpora/make_demo.py OUT_DIR [--scale X] [--seed N]

writes OUT_DIR/train/, OUT_DIR/test/ (a file-level split, about 80/20 within each kind,
fixed by the seed) and OUT_DIR/manifest.tsv (split, name, bytes, SHA-256 of every file).
At scale 1 this is about 3 MB of training files and 0.6 MB of test files, each file
between about 5 KB and 200 KB. Scale below 1 shrinks the files; scale above 1 adds
files (more time periods) and keeps their sizes.

Byte-identical output across runs and machines: every random stream is a
random.Random seeded with a string (str seeds are hashed with SHA-512, so
PYTHONHASHSEED plays no part), only IEEE-754 basic arithmetic and sqrt are used (no
libm calls such as math.sin, math.exp or random.gauss, whose last bit can differ between
C libraries), floats are printed by CPython's own formatting, dates are fixed, no
directory listing decides an order and files are written as bytes.

Pure standard library. `generate(out_dir, scale) -> dict`; corpora/make_demo.py is its script.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import random
import sys
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path

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


def telemetry_files(seed: int, st: Station, n_chunks: int, rows: int) -> list:
    site = st.site
    rng = random.Random("%d:telemetry:%s" % (seed, site.code))
    dt = site.interval_s
    f = dt / 600.0
    sf = math.sqrt(f)  # sqrt is correctly rounded by IEEE-754, so deterministic
    t = rng.randrange(0, 12) * DAY
    anom_t = 2.0 * gauss_(rng)
    anom_p = 4.0 * gauss_(rng)
    anom_rh = 5.0 * gauss_(rng)
    cloud = rng.random()
    wind_state = site.wind_mean
    wdir = float(site.prevailing_deg)
    snow = rng.uniform(60.0, 180.0)
    batt = rng.uniform(12.6, 13.4)
    enc = st.t_base + 3.0
    heater = 0
    rime = 0.0
    gap = 0
    dropout = {"rh": 0, "wind": 0, "snow": 0, "sw": 0}
    logger = st.devices["logger"]
    cols = ["time_utc", "t_air_c", "rh_pct", "p_hpa", "wind_ms", "wind_dir_deg", "gust_ms",
            "sw_in_wm2", "snow_cm", "enc_t_c", "batt_v", "heater"]
    if site.seismic:
        cols.append("seis_rms_nms")
    cols.append("qc")
    out = []
    for _ in range(n_chunks):
        lines = [
            "# %s telemetry export, format 2" % NETWORK,
            '# station %s "%s" alt_m=%d grid="%s"' % (site.code, site.name, site.altitude_m, site.grid_ref),
            "# logger %s fw=%s interval_s=%d" % (logger.dev_id, logger.fw(t), dt),
            "# units: degC, %, hPa, m/s, deg, m/s, W/m2, cm, degC, V, on/off, "
            + ("nm/s, flags" if site.seismic else "flags"),
            ",".join(cols),
        ]
        name = "%s_telemetry_%s.csv" % (st.low, file_stamp(t))
        for _ in range(rows):
            g = gauss_
            hour = (t % DAY) / 3600.0
            cloud = clip(cloud + f * 0.01 * (0.55 - cloud) + sf * 0.06 * g(rng), 0.0, 1.0)
            clear = 1.0 - cloud
            anom_t += -f * 0.0015 * anom_t + sf * 0.10 * g(rng)
            anom_p += -f * 0.0008 * anom_p + sf * 0.22 * g(rng)
            anom_rh += -f * 0.01 * anom_rh + sf * 0.9 * g(rng)
            diurnal = sin_(TWO_PI * (hour - 9.0) / 24.0)
            t_air = st.t_base + (1.5 + 3.0 * clear) * diurnal + anom_t + 0.04 * g(rng)
            rh = clip(70.0 + 18.0 * cloud - 2.0 * (t_air - st.t_base) + anom_rh, 5.0, 100.0)
            p = site.p_base_hpa + anom_p + 0.6 * sin_(TWO_PI * hour / 12.0) + 0.03 * g(rng)
            wind_state += f * 0.015 * (site.wind_mean * (0.6 + 0.8 * cloud) - wind_state) + sf * 0.35 * g(rng)
            wind = max(0.0, wind_state + 0.5 * g(rng))
            diff = ((site.prevailing_deg - wdir + 540.0) % 360.0) - 180.0
            wdir = (wdir + f * 0.01 * diff + sf * (4.0 + 8.0 / (1.0 + wind)) * g(rng)) % 360.0
            gust = wind * (1.2 + 0.5 * rng.random()) + 0.5 * rng.random()
            if 7.1 < hour < 16.4:
                e = sin_(PI * (hour - 7.1) / 9.3)
                sw = max(0.0, 680.0 * e * e * (0.25 + 0.75 * clear) * (1.0 + 0.05 * g(rng)))
            else:
                sw = 0.0
            if rh > 90.0 and t_air < 0.5 and cloud > 0.6:
                snow += rng.random() * 0.4 * f
            snow -= snow * 0.00015 * f
            if wind > 12.0:
                snow -= 0.05 * f
            snow = max(snow, 0.0)
            enc += 0.2 * (t_air + 3.0 + 0.011 * sw + (7.0 if heater else 0.0) - enc)
            if heater == 0 and enc < -18.0:
                heater = 1
            elif heater == 1 and enc > -12.0:
                heater = 0
            batt += f * (0.00006 * sw - 0.0009 - (0.004 if heater else 0.0))
            if batt > 13.8:
                batt = 13.8 - 0.01 * rng.random()
            if batt < 11.4:
                batt = 11.4
            if rh > 96.0 and t_air < -3.0 and wind > 4.0:
                rime = min(1.0, rime + 0.02 * f)
            else:
                rime = max(0.0, rime - 0.01 * f)
            qc = []
            if batt < 11.8:
                qc.append("B")
            if rime > 0.5:
                qc.append("R")
                wind *= 0.6
                gust *= 0.6
            snow_read = snow + 0.3 * g(rng)
            if rng.random() < 0.002:
                snow_read += rng.uniform(25.0, 90.0)
                qc.append("S")
            for key in dropout:
                if dropout[key] > 0:
                    dropout[key] -= 1
                elif rng.random() < 0.0008:
                    dropout[key] = rng.randrange(3, 60)
            if gap > 0:
                gap -= 1
            elif rng.random() < 0.002:
                gap = rng.randrange(2, 40)
            if gap == 0:
                blank_w = dropout["wind"] > 0
                row = [
                    iso_s(t),
                    "%.2f" % t_air,
                    "" if dropout["rh"] else "%.1f" % rh,
                    "%.2f" % p,
                    "" if blank_w else "%.1f" % wind,
                    "" if blank_w else "%d" % (int(round(wdir)) % 360),
                    "" if blank_w else "%.1f" % gust,
                    "" if dropout["sw"] else "%d" % int(round(sw)),
                    "" if dropout["snow"] else "%.1f" % snow_read,
                    "%.1f" % enc,
                    "%.3f" % (batt + 0.003 * g(rng)),
                    "%d" % heater,
                ]
                if site.seismic:
                    rms = 9.0 + 0.9 * wind + 2.0 * abs(g(rng))
                    if rng.random() < 0.003:
                        rms *= rng.uniform(5.0, 40.0)
                    row.append("%.1f" % rms)
                row.append("".join(qc))
                lines.append(",".join(row))
            t += dt
        out.append(("telemetry", name, lines))
    return out


# ---------------------------------------------------------------------------
# Event records (JSON lines)
# ---------------------------------------------------------------------------

EVENT_WEIGHTS = (
    ("gust_alarm", 14), ("seismic_trigger", 10), ("battery_low", 5), ("heater_cycle", 18),
    ("comms_dropout", 10), ("snow_step", 8), ("clock_resync", 12), ("enclosure_open", 2),
    ("rime_ice", 8),
)
SEVERITY = {
    "gust_alarm": "warning", "seismic_trigger": "notice", "battery_low": "warning",
    "heater_cycle": "info", "comms_dropout": "error", "snow_step": "notice",
    "clock_resync": "info", "enclosure_open": "warning", "rime_ice": "warning",
    "health_report": "info", "firmware_apply": "notice",
}
EVENT_TAGS = {
    "gust_alarm": ["auto", "wind"], "seismic_trigger": ["auto", "seismic"],
    "battery_low": ["auto", "power"], "heater_cycle": ["power"],
    "comms_dropout": ["auto", "uplink"], "snow_step": ["qc", "snow"],
    "clock_resync": ["time"], "enclosure_open": ["security", "site"],
    "rime_ice": ["auto", "icing"], "health_report": ["periodic"],
    "firmware_apply": ["fleet", "maintenance"],
}
ACK_NOTES = (
    "seen, no action", "watching trend", "expected during storm", "ticket raised",
    "checked against neighbour station", "will inspect on next visit", "false alarm",
    "confirmed on camera", "forwarded to seismic desk", "heater duty looks normal",
)
EVENT_ROLE = {
    "gust_alarm": "wind", "seismic_trigger": "seismo", "battery_low": "power",
    "heater_cycle": "power", "comms_dropout": "gateway", "snow_step": "snow",
    "clock_resync": "gateway", "enclosure_open": "logger", "health_report": "logger",
}


def _event_data(rng: random.Random, st: Station, kind: str, t: float) -> tuple:
    """Returns (source role, payload dict) for one event."""
    site = st.site
    if kind == "gust_alarm":
        return "wind", {
            "gust_ms": round(st.gust_limit + rng.uniform(0.3, 16.0), 1),
            "dir_deg": int(site.prevailing_deg + 40.0 * gauss_(rng)) % 360,
            "threshold_ms": st.gust_limit,
            "duration_s": rng.randrange(5, 240),
        }
    if kind == "seismic_trigger":
        t_p = t + rng.uniform(0.5, 3.0)
        has_s = rng.random() < 0.7
        dur = rng.uniform(20.0, 90.0)
        return "seismo", {
            "sta_lta": round(rng.uniform(3.2, 12.0), 2),
            "pgv_um_s": round(rng.uniform(0.4, 35.0), 2),
            "channels": sorted(rng.sample(["E", "N", "Z"], rng.choice((1, 3, 3)))),
            "window": {"start": iso_ms(t - 10.0), "end": iso_ms(t + dur)},
            "picks": {"p": iso_ms(t_p), "s": iso_ms(t_p + rng.uniform(1.5, 9.0)) if has_s else None},
            "snippet": ("%s_wave_%s.csv" % (st.low, file_stamp(t))) if rng.random() < 0.4 else None,
        }
    if kind == "battery_low":
        return "power", {
            "volts": round(rng.uniform(11.4, 11.9), 2),
            "soc_pct": rng.randrange(8, 30),
            "load_w": round(rng.uniform(3.0, 14.0), 1),
            "action": rng.choice(("shed_heater", "shed_fallback_radio", "none")),
        }
    if kind == "heater_cycle":
        on_s = rng.randrange(180, 1800)
        return "power", {
            "on_s": on_s,
            "enc_t_c": round(rng.uniform(-24.0, -15.0), 1),
            "energy_wh": round(on_s * 0.0125 * rng.uniform(0.9, 1.1), 1),
        }
    if kind == "comms_dropout":
        down = int(rng.uniform(30, 600) + rng.uniform(0, 1) * rng.uniform(0, 6000))
        return "gateway", {
            "link": site.relay,
            "down_s": down,
            "rssi_dbm": -rng.randrange(96, 118),
            "retries": rng.randrange(3, 25),
            "queued_frames": down // FRAME_S + rng.randrange(0, 4),
            "fallback": "sat-burst" if down > 1800 else None,
        }
    if kind == "snow_step":
        return "snow", {
            "delta_cm": round(rng.uniform(-30.0, 45.0), 1),
            "confidence": round(rng.random(), 2),
            "suspect": rng.choice(("drift", "spike", "real_snowfall", "wind_scour")),
        }
    if kind == "clock_resync":
        src = "gnss" if rng.random() < 0.85 else "relay"
        return "gateway", {
            "offset_ms": round(40.0 * gauss_(rng), 1),
            "source": src,
            "sats": rng.randrange(4, 14) if src == "gnss" else 0,
        }
    if kind == "enclosure_open":
        expected = rng.random() < 0.8
        return "logger", {
            "door": rng.choice("AB"),
            "badge": "op-%04d" % rng.randrange(1000, 1300) if expected else None,
            "expected": expected,
            "closed_after_s": rng.randrange(40, 5400),
        }
    if kind == "rime_ice":
        return "wind", {
            "sensor": rng.choice(("wind", "radiation", "thermohygro")),
            "heater_duty_pct": rng.randrange(20, 100),
            "ice_mm": round(rng.uniform(0.5, 12.0), 1),
        }
    raise ValueError(kind)


def event_files(seed: int, st: Station, n_months: int, len_mult: float) -> list:
    rng = random.Random("%d:events:%s" % (seed, st.code))
    seq = rng.randrange(10000, 90000)
    boot_s = -rng.randrange(1, 40) * DAY
    kinds = [k for k, _ in EVENT_WEIGHTS if st.site.seismic or k != "seismic_trigger"]
    weights = [w for k, w in EVENT_WEIGHTS if st.site.seismic or k != "seismic_trigger"]
    out = []
    for m in range(n_months):
        y, mo = 2031 + (10 + m) // 12, (10 + m) % 12 + 1
        y2, mo2 = 2031 + (11 + m) // 12, (11 + m) % 12 + 1
        start = (datetime(y, mo, 1) - EPOCH).total_seconds()
        end = (datetime(y2, mo2, 1) - EPOCH).total_seconds()
        end = start + (end - start) * len_mult
        times = []
        t = start + rng.randrange(0, 6 * 3600)
        while t < end:
            times.append((t, "health_report"))
            t += 6 * 3600 + rng.uniform(-60.0, 60.0)
        n_other = int(round(85 * len_mult))
        for _ in range(n_other):
            times.append((rng.uniform(start, end), rng.choices(kinds, weights)[0]))
        for dev in st.devices.values():
            if dev.upgrade_s is not None and start <= dev.upgrade_s < end:
                times.append((float(dev.upgrade_s), "firmware_apply:" + dev.role))
        times.sort()
        lines = []
        for t, kind in times:
            seq += 1
            t = round(t, 3)
            if kind == "health_report":
                role = "logger"
                up_s = int(t - boot_s)
                data = {
                    "uptime_s": up_s,
                    "cpu_pct": round(clip(6.0 + 3.0 * gauss_(rng), 0.5, 95.0), 1),
                    "mem_free_kb": 20480 + rng.randrange(-900, 900) * 4,
                    "disk_free_mb": max(12, 1900 - up_s // 7200),
                    "temps_c": {"cpu": round(st.t_base + 22.0 + 3.0 * gauss_(rng), 1),
                                "board": round(st.t_base + 9.0 + 3.0 * gauss_(rng), 1)},
                    "queue_frames": rng.choice((0, 0, 0, 0, 1, 2, rng.randrange(3, 200))),
                    "links": [
                        {"id": st.site.relay, "up": rng.random() < 0.97,
                         "rssi_dbm": -rng.randrange(78, 104)},
                        {"id": "sat-burst", "up": False, "rssi_dbm": None},
                    ],
                }
                kind_out = kind
            elif kind.startswith("firmware_apply:"):
                role = kind.split(":", 1)[1]
                dev = st.devices[role]
                reboot = rng.randrange(25, 140)
                data = {
                    "device_role": role,
                    "from": dev.fw_old,
                    "to": dev.fw_new,
                    "result": "ok" if rng.random() < 0.9 else "ok_after_retry",
                    "reboot_s": reboot,
                    "image_sha256": hexstr(rng, 64),
                }
                if role == "logger":
                    boot_s = t + reboot
                kind_out = "firmware_apply"
            else:
                role, data = _event_data(rng, st, kind, t)
                kind_out = kind
            dev = st.devices[role]
            sev = SEVERITY[kind_out]
            ack = None
            if sev in ("warning", "error") and rng.random() < 0.7:
                ack = {"by": rng.choice((st.primary, st.backup, st.primary)),
                       "at": iso_ms(t + rng.uniform(30.0, 6 * 3600.0)),
                       "note": rng.choice(ACK_NOTES)}
            rec = {
                "seq": seq,
                "ts": iso_ms(t),
                "stn": st.code,
                "kind": kind_out,
                "sev": sev,
                "src": {"dev": dev.dev_id, "model": dev.model, "fw": dev.fw(t)},
                "data": data,
                "ack": ack,
                "tags": EVENT_TAGS[kind_out],
            }
            lines.append(json.dumps(rec, ensure_ascii=False))
        out.append(("events", "%s_events_%04d-%02d.jsonl" % (st.low, y, mo), lines))
    return out


# ---------------------------------------------------------------------------
# Gateway service log
# ---------------------------------------------------------------------------

SENSOR_BUS = (("thermohygro", "i2c-1", 0x44), ("baro", "i2c-1", 0x76), ("wind", "rs485-0", 0x11),
              ("snow", "rs485-0", 0x21), ("radiation", "adc-2", 0x00))


def gateway_log_files(seed: int, st: Station, n_files: int, days: float) -> list:
    rng = random.Random("%d:gwlog:%s" % (seed, st.code))
    site = st.site
    gw = st.devices["gateway"]
    host = "%s-gw" % st.low
    t0 = rng.randrange(0, 20) * DAY
    frame_seq = rng.randrange(1000, 60000)
    out = []
    for _ in range(n_files):
        t_end = t0 + days * DAY
        ev = []  # (t, order, severity, process, message)
        n = [0]

        def emit(t, sev, proc, msg):
            n[0] += 1
            ev.append((round(t, 3), n[0], sev, proc, msg))

        pids = {p: rng.randrange(300, 4000) for p in
                ("skyrd", "linkkeeper", "heaterctl", "pwrmon", "syncclock", "quakewatch", "fwagent", "fieldlink")}
        # outage windows for the radio uplink
        outages = []
        t = t0 + rng.uniform(2, 20) * 3600
        while t < t_end:
            dur = rng.uniform(300, 2400) if rng.random() < 0.8 else rng.uniform(2400, 9000)
            outages.append((t, t + dur))
            t += dur + rng.uniform(6, 40) * 3600

        def down(tt):
            return any(a <= tt < b for a, b in outages)

        queued = 0
        t = t0 + rng.uniform(0, FRAME_S)
        while t < t_end:
            frame_seq += 1
            rows = FRAME_S // site.interval_s
            nbytes = 64 + rows * rng.randrange(150, 190)
            emit(t, "INFO", "skyrd", "frame %d sealed rows=%d bytes=%d crc32c=%s"
                 % (frame_seq, rows, nbytes, hexstr(rng, 8)))
            if rng.random() < 0.004:
                emit(t + 0.004, "ERROR", "skyrd", "frame %d checksum mismatch on readback\n"
                     "    expected=%s got=%s\n    retained copy /var/spool/skyr/bad/%d.frm"
                     % (frame_seq, hexstr(rng, 8), hexstr(rng, 8), frame_seq))
            if rng.random() < 0.006:
                role, bus, addr = rng.choice(SENSOR_BUS)
                emit(t - rng.uniform(1, 60), "ERROR", "skyrd", "sensor %s (%s) on %s addr 0x%02x timeout after %dms"
                     % (role, st.devices[role].dev_id, bus, addr, rng.choice((250, 500, 1000))))
            tu = t + rng.uniform(0.5, 4.0)
            if down(tu):
                queued += 1
                for i in range(1, 6):
                    emit(tu + 20 * (2 ** (i - 1) - 1), "WARN", "linkkeeper",
                         "uplink via %s retry %d/5 (rssi=%ddBm snr=%.1fdB)"
                         % (site.relay, i, -rng.randrange(99, 118), rng.uniform(-3.0, 2.5)))
                emit(tu + 620.2, "ERROR", "linkkeeper",
                     "uplink via %s failed after 5 retries; frame %d queued (%d pending)"
                     % (site.relay, frame_seq, queued))
            elif queued:
                emit(tu, "NOTICE", "linkkeeper", "uplink via %s restored, flushing %d queued frames"
                     % (site.relay, queued))
                emit(tu + 0.8 * queued + 0.3, "INFO", "linkkeeper", "queue flushed: %d frames, %d bytes in %.1fs"
                     % (queued, queued * nbytes, 0.8 * queued + 0.1))
                queued = 0
            else:
                emit(tu, "INFO", "linkkeeper", "uplink via %s ok frame=%d rtt=%dms rssi=%ddBm"
                     % (site.relay, frame_seq, rng.randrange(180, 900), -rng.randrange(76, 99)))
            t += FRAME_S + rng.uniform(-0.4, 0.4)
        # hourly and slower processes
        t = t0 + rng.uniform(0, 3600)
        heater_on = False
        while t < t_end:
            emit(t + rng.uniform(0.5, 2.0), "DEBUG", "skyrd", "sampler tick drift=%+dus budget=%dms"
                 % (int(60 * gauss_(rng)), rng.randrange(38, 71)))
            hour = (t % DAY) / 3600.0
            panel = 0.0 if not 7.2 < hour < 16.3 else max(0.0, st.panel_wp * 0.7 * sin_(PI * (hour - 7.2) / 9.1)
                                                             * rng.uniform(0.3, 1.0))
            volts = 12.2 + panel / st.panel_wp * 1.4 + 0.15 * gauss_(rng)
            state = "bulk" if panel > 100 else "float" if panel > 20 else "discharge"
            emit(t + rng.uniform(2.0, 9.0), "INFO", "pwrmon", "charge state %s panel=%.1fW batt=%.2fV load=%.1fW"
                 % (state, panel, volts, rng.uniform(4.5, 9.5)))
            if volts < 11.85:
                emit(t + 9.1, "WARN", "pwrmon", "battery %.2fV below soft limit 11.80V, shedding %s"
                     % (volts, rng.choice(("heater", "fallback radio"))))
            if site.seismic:
                emit(t + rng.uniform(10.0, 30.0), "DEBUG", "quakewatch", "noise floor %.1f nm/s band 1-20Hz (lta %.1f)"
                     % (rng.uniform(8.0, 30.0), rng.uniform(8.0, 25.0)))
                if rng.random() < 0.05:
                    tt = t + rng.uniform(5, 3500)
                    emit(tt, "INFO", "quakewatch", "trigger sta/lta=%.2f on Z, snippet %s_wave_%s.csv stored"
                         % (rng.uniform(3.2, 11.0), st.low, file_stamp(tt)))
            if (not 8 < hour < 15) and rng.random() < 0.35:
                heater_on = not heater_on
                if heater_on:
                    emit(t + rng.uniform(60, 3000), "INFO", "heaterctl", "heater on enc=%.1fC setpoint=-15.0C"
                         % rng.uniform(-20.0, -18.0))
                else:
                    emit(t + rng.uniform(60, 3000), "INFO", "heaterctl", "heater off enc=%.1fC after %ds"
                         % (rng.uniform(-12.0, -10.0), rng.randrange(300, 3000)))
            if int(hour) % 6 == 0:
                if rng.random() < 0.93:
                    emit(t + rng.uniform(30.0, 90.0), "INFO", "syncclock", "offset %+.1fms from gnss (%d sats), slewing"
                         % (30 * gauss_(rng), rng.randrange(5, 14)))
                else:
                    emit(t + rng.uniform(30.0, 90.0), "WARN", "syncclock", "gnss lost, holding over (drift estimate %.2fppm)"
                         % rng.uniform(0.1, 2.5))
            if rng.random() < 0.01:
                op = rng.choice((st.primary, st.backup))
                tt = t + rng.uniform(0, 3000)
                emit(tt, "NOTICE", "fieldlink", "session opened for %s from 10.42.%d.%d (radio console)"
                     % (op, rng.randrange(1, 12), rng.randrange(2, 250)))
                emit(tt + rng.uniform(60, 900), "NOTICE", "fieldlink", "session closed for %s" % op)
            t += 3600 + rng.uniform(-1.0, 1.0)
        if gw.upgrade_s is not None and t0 <= gw.upgrade_s < t_end:
            u = gw.upgrade_s
            emit(u - 600, "INFO", "fwagent", "staged image %s sha256=%s... verify ok" % (gw.fw_new, hexstr(rng, 16)))
            emit(u, "NOTICE", "fwagent", "rebooting into %s (was %s)" % (gw.fw_new, gw.fw_old))
            emit(u + 41.0, "INFO", "init", "%s gateway boot, fw %s, %s" % (NETWORK, gw.fw_new, gw.model))
            emit(u + 44.5, "INFO", "init", "mounted /var/spool/skyr (%d frames kept)" % rng.randrange(100, 4000))
        ev.sort()
        lines = []
        for t, _, sev, proc, msg in ev:
            if t < t0 or t >= t_end:
                continue
            pid = pids.get(proc, 1)
            lines.append("%s %s %-6s %s[%d]: %s" % (log_stamp(t), host, sev, proc, pid, msg))
        out.append(("gateway_log", "%s_gateway_%s.log" % (st.low, file_stamp(t0)), lines))
        t0 = t_end + rng.randrange(1, 5) * DAY
    return out


# ---------------------------------------------------------------------------
# Relay traffic log
# ---------------------------------------------------------------------------


def relay_log_files(seed: int, relay: str, stations: list, n_files: int, days: float) -> list:
    rng = random.Random("%d:relay:%s" % (seed, relay))
    place, members = RELAYS[relay]
    by_code = {s.code: s for s in stations}
    seqs = {c: rng.randrange(1000, 60000) for c in members}
    t0 = rng.randrange(0, 20) * DAY
    out = []
    for _ in range(n_files):
        t_end = t0 + days * DAY
        ev = []
        for c in members:
            st = by_code[c]
            rssi_base = -rng.randrange(80, 96)
            t = t0 + rng.uniform(0, FRAME_S)
            while t < t_end:
                seqs[c] += 1
                rssi = rssi_base + int(round(3 * gauss_(rng)))
                snr = 12.0 + (rssi - rssi_base) * 0.8 + gauss_(rng)
                ok = rng.random() < 0.985
                ev.append((round(t, 3), "rx %s seq=%d len=%d rssi=%d snr=%.1f fwd=%s"
                           % (st.code, seqs[c], 64 + (FRAME_S // st.site.interval_s) * rng.randrange(150, 190),
                              rssi, snr, "ok" if ok else "held")))
                if not ok:
                    ev.append((round(t + rng.uniform(30, 300), 3), "fwd %s seq=%d retry=1 ok" % (st.code, seqs[c])))
                t += FRAME_S + rng.uniform(-2.0, 2.0)
        t = t0 + rng.uniform(0, 1800)
        while t < t_end:
            ev.append((round(t, 3), "hub backhaul ops-desk loss=%.1f%% rtt=%dms battery=%.2fV"
                       % (max(0.0, rng.uniform(-2.0, 4.0)), rng.randrange(40, 260), rng.uniform(12.1, 13.7))))
            if rng.random() < 0.05:
                ev.append((round(t + rng.uniform(0, 1700), 3), "hub backhaul degraded loss=%.1f%% switching to %s"
                           % (rng.uniform(10, 60), rng.choice(("alt-path", "store-and-forward")))))
            t += 1800 + rng.uniform(-3.0, 3.0)
        ev.sort()
        lines = ["%s %s %s" % (iso_ms(t), relay, msg) for t, msg in ev if t0 <= t < t_end]
        out.append(("relay_log", "%s_%s_%s.log" % (relay.replace("-", ""), place.split()[0].lower(),
                                                  file_stamp(t0)), lines))
        t0 = t_end + rng.randrange(1, 4) * DAY
    return out


# ---------------------------------------------------------------------------
# Seismometer snippets
# ---------------------------------------------------------------------------


def waveform_files(seed: int, st: Station, n_files: int, len_mult: float) -> list:
    rng = random.Random("%d:wave:%s" % (seed, st.code))
    sm = st.devices["seismo"]
    rate = 100
    gain = rng.choice((392, 754, 1500))
    t_start = rng.randrange(1, 25) * DAY + rng.randrange(0, DAY)
    out = []
    for _ in range(n_files):
        dur = max(2.0, rng.uniform(20.0, 40.0) * len_mult)
        n = int(dur * rate)
        ratio = rng.uniform(3.3, 11.0)
        lines = [
            "# %s quakewatch snippet" % NETWORK,
            "# station %s sensor %s fw=%s rate_hz=%d counts_per_um_s=%d"
            % (st.code, sm.dev_id, sm.fw(t_start), rate, gain),
            "# start %s trigger_sta_lta=%.2f" % (iso_ms(t_start), ratio),
            "sample,z,n,e",
        ]
        # background: damped second-order noise per component (microseism-like)
        hist = [[0.0, 0.0] for _ in range(3)]
        noise = [rng.uniform(6.0, 14.0) for _ in range(3)]
        # arrivals: P mostly on Z, S mostly on N/E; each a decaying oscillation
        i_p = int(n * rng.uniform(0.2, 0.3))
        i_s = i_p + int(rate * rng.uniform(1.5, 8.0))
        waves = []
        for i0, freq, amps, decay in (
            (i_p, rng.uniform(6.0, 10.0), (1.0, 0.35, 0.3), 0.985),
            (i_s, rng.uniform(2.0, 5.0), (0.4, 1.0, 0.9), 0.992),
        ):
            a = rng.uniform(150.0, 2500.0)
            w = TWO_PI * freq / rate
            cw, sw_ = cos_(w), sin_(w)
            comps = []
            for k in range(3):
                ph = rng.uniform(0.0, TWO_PI)
                comps.append([cos_(ph), sin_(ph), a * amps[k]])
            waves.append([i0, cw, sw_, decay, comps, 0.0])
        for i in range(n):
            vals = []
            for k in range(3):
                x = 1.6 * hist[k][0] - 0.7 * hist[k][1] + noise[k] * gauss_(rng)
                hist[k][1], hist[k][0] = hist[k][0], x
                vals.append(x + 2.0 * gauss_(rng))
            for wv in waves:
                i0, cw, sw_, decay, comps, env = wv
                if i < i0:
                    continue
                # envelope rises over ~0.1 s, then decays geometrically
                env = min(1.0, (i - i0 + 1) / 10.0) if i - i0 < 10 else env * decay
                wv[5] = env
                for k in range(3):
                    c, s, amp = comps[k]
                    vals[k] += amp * env * s
                    comps[k][0], comps[k][1] = c * cw - s * sw_, s * cw + c * sw_
            lines.append("%d,%d,%d,%d" % (i, int(round(vals[0])), int(round(vals[1])), int(round(vals[2]))))
        out.append(("waveform", "%s_wave_%s.csv" % (st.low, file_stamp(t_start)), lines))
        t_start += rng.randrange(2, 12) * DAY + rng.randrange(0, DAY)
    return out


# ---------------------------------------------------------------------------
# Station profile (INI-like)
# ---------------------------------------------------------------------------

SENSOR_SECTIONS = (
    ("air_temp", "thermohygro", 2.0, "-50 .. 40", "0.01"),
    ("humidity", "thermohygro", 2.0, "0 .. 100", "0.1"),
    ("pressure", "baro", 1.2, "500 .. 1100", "0.01"),
    ("wind", "wind", 4.5, "0 .. 75", "0.1"),
    ("snow_depth", "snow", 3.0, "0 .. 800", "0.1"),
    ("shortwave", "radiation", 2.5, "0 .. 2000", "1"),
)
MAINT_NOTES = (
    "replaced {role} ({dev}), old unit sent for bench check",
    "recalibrated {role} against travelling standard, offset {off:+.3f}",
    "cleared rime from mast and {role}; heater element tested {ohm:.1f} ohm",
    "re-tensioned guy wires, mast plumb within {mm} mm",
    "swapped battery bank string {n}, capacity test {ah} Ah",
    "updated {role} firmware to {fw} by radio console",
    "sealed cable gland on enclosure door {door}, desiccant changed",
    "moved snow ranger target plate {cm} cm west after drift build-up",
    "antenna realigned towards {relay}, rssi improved by {db} dB",
    "lightning arrestor on {relay} feed replaced after surge",
)


def profile_file(seed: int, st: Station) -> tuple:
    rng = random.Random("%d:profile:%s" % (seed, st.code))
    site = st.site
    d = st.devices
    L = [
        "; Station profile, %s fleet registry" % NETWORK,
        "; exported %s by fleetreg 1.6; edit through the registry, not by hand" % day_str(-4 * DAY),
        "",
        "[station]",
        "code = %s" % site.code,
        "name = %s" % site.name,
        "network = %s" % NETWORK,
        "altitude_m = %d" % site.altitude_m,
        "grid_ref = %s" % site.grid_ref,
        "commissioned = %s" % day_str(st.commissioned_s),
        "access = %s" % rng.choice(("helicopter from Lornach", "ski tour from Kettle hut (5 h)",
                                    "helicopter; ski tour in spring", "cable car + 2 h on foot")),
        "primary_operator = %s" % st.primary,
        "backup_operator = %s" % st.backup,
        "relay = %s (%s)" % (site.relay, RELAYS[site.relay][0]),
        "",
        "[logger]",
        "device = %s" % d["logger"].dev_id,
        "model = %s" % d["logger"].model,
        "firmware = %s" % d["logger"].fw_old,
        "sample_interval_s = %d" % site.interval_s,
        "frame_interval_s = %d" % FRAME_S,
        "storage_mb = %d" % rng.choice((1024, 2048, 4096)),
        "",
        "[gateway]",
        "device = %s" % d["gateway"].dev_id,
        "model = %s" % d["gateway"].model,
        "firmware = %s" % d["gateway"].fw_old,
        "hostname = %s-gw" % st.low,
        "",
    ]
    for name, role, height, rng_txt, res in SENSOR_SECTIONS:
        dev = d[role]
        L += [
            "[sensor.%s]" % name,
            "device = %s" % dev.dev_id,
            "model = %s" % dev.model,
            "firmware = %s" % dev.fw_old,
            "height_m = %.1f" % height,
            "range = %s" % rng_txt,
            "resolution = %s" % res,
            "cal_date = %s" % day_str(-rng.randrange(60, 500) * DAY),
            "cal_c0 = %.4f" % (0.02 * gauss_(rng)),
            "cal_c1 = %.6f" % (1.0 + 0.0005 * gauss_(rng)),
            "cal_c2 = %.2e" % (3e-6 * gauss_(rng)),
            "heated = %s" % rng.choice(("yes", "no")),
            "",
        ]
    L += [
        "[uplink]",
        "primary = %s" % site.relay,
        "fallback = sat-burst",
        "retry_max = 5",
        "retry_backoff_s = 20, 40, 80, 160, 320",
        "frame_queue_max = %d" % rng.choice((2000, 4000, 8000)),
        "",
        "[power]",
        "controller = %s" % d["power"].dev_id,
        "battery_ah = %d" % st.battery_ah,
        "panel_wp = %d" % st.panel_wp,
        "soft_limit_v = 11.80",
        "hard_limit_v = 11.40",
        "heater_on_below_c = -18",
        "heater_off_above_c = -12",
        "",
    ]
    if site.seismic:
        L += [
            "[seismic]",
            "device = %s" % d["seismo"].dev_id,
            "model = %s" % d["seismo"].model,
            "rate_hz = 100",
            "components = Z, N, E",
            "sta_s = 0.5",
            "lta_s = 30",
            "trigger_ratio = %.1f" % rng.choice((3.0, 3.2, 3.5)),
            "detrigger_ratio = 1.5",
            "pre_event_s = 10",
            "post_event_s = 30",
            "vault = %s" % rng.choice(("rock bolt pier", "buried vault 1.2 m", "concrete plinth")),
            "",
        ]
    L += [
        "[alarms]",
        "gust_ms = %.1f" % st.gust_limit,
        "battery_v = 11.80",
        "enclosure_door = notify",
        "snow_step_cm = %d" % rng.choice((15, 20, 25)),
        "rime_duty_pct = %d" % rng.choice((60, 70, 80)),
        "",
        "[maintenance]",
        "; date = work done (operator)",
    ]
    roles = [r for r in d if r not in ("logger", "gateway", "power")]
    t = st.commissioned_s + rng.randrange(30, 120) * DAY
    while t < -20 * DAY:
        role = rng.choice(roles)
        note = rng.choice(MAINT_NOTES).format(
            role=role, dev=d[role].dev_id, off=0.05 * gauss_(rng),
            ohm=rng.uniform(10.0, 14.0), mm=rng.randrange(3, 40), n=rng.choice("AB"),
            ah=rng.randrange(int(st.battery_ah * 0.7), st.battery_ah + 1), fw=rng.choice(("4.2.6", "2.3.4", "1.9.0")),
            door=rng.choice("AB"), cm=rng.randrange(10, 80), relay=site.relay, db=rng.randrange(2, 9))
        op = rng.choice([o for o, _ in OPERATORS])
        L.append("%s = %s (%s)" % (day_str(t), note, op))
        t += rng.randrange(10, 60) * DAY
    L.append("")
    return ("profile", "%s_profile.ini" % st.low, L)


# ---------------------------------------------------------------------------
# Field visit reports (plain text)
# ---------------------------------------------------------------------------

# (template, roles the {role} placeholder may take; None: any non-core device)
WORK_ITEMS = (
    ("Replaced {role} unit {dev} with a spare; old unit bagged for bench test.", None),
    ("Cleaned radiometer dome; rime residue on the {side} face, no scratches.", ()),
    ("Checked guy wire tension on all {n} anchors; {k} re-tensioned.", ()),
    ("Downloaded {mb} MB from logger storage as a backup of the radio feed.", ()),
    ("Tested heater element of the {role} sensor: {ohm:.1f} ohm, within tolerance.",
     ("wind", "thermohygro", "radiation")),
    ("Re-levelled the seismometer pier; bubble was {mm:.1f} mm off centre.", ("seismo",)),
    ("Swapped desiccant in enclosure {door}; old pack {pct}% saturated.", ()),
    ("Cleared snow from solar panels; panel output rose from {w1} W to {w2} W.", ()),
    ("Applied firmware {fw} to the {model} ({dev}) through the radio console.", None),
    ("Photographed mast and sensors from the four cardinal points.", ()),
    ("Replaced cable gland on enclosure door {door}; seal had cracked in the cold.", ()),
)
FINDINGS = (
    "Snow ranger reads {d:.1f} cm high compared with the manual probe ({p} cm).",
    "Battery bank {n} shows uneven charge, {v:.2f} V against {v2:.2f} V.",
    "Slight play in the {role} mounting bracket; tightened, recheck next visit.",
    "Rime build-up pattern suggests prevailing wind from {deg} degrees.",
    "No visible damage after the storm of {day}.",
    "Radio antenna coax shows abrasion near the mast clamp.",
    "Fox tracks around the enclosure; no cables chewed this time.",
)


def visits_files(seed: int, st: Station, n_files: int, visits_per_file: int) -> list:
    rng = random.Random("%d:visits:%s" % (seed, st.code))
    site = st.site
    d = st.devices
    roles = [r for r in d if r not in ("logger", "gateway")]
    names = dict(OPERATORS)
    out = []
    for fi in range(n_files):
        year = 2031 - fi
        L = ["%s field visit reports, %s %s, %d" % (NETWORK, site.code, site.name, year), ""]
        days = sorted(rng.sample(range(150, 300), visits_per_file))
        for day in days:
            t = (datetime(year, 1, 1) - EPOCH).total_seconds() + day * DAY
            team = rng.sample([o for o, _ in OPERATORS], rng.choice((2, 2, 3)))
            L += [
                "=== Visit %s ===" % day_str(t),
                "Team: %s" % ", ".join(team),
                "Access: %s, on site %02d:%02d to %02d:%02d UTC" % (
                    rng.choice(("helicopter from Lornach", "ski tour from Kettle hut", "on foot from the col")),
                    rng.randrange(6, 9), rng.randrange(0, 60), rng.randrange(12, 15), rng.randrange(0, 60)),
                "Conditions on arrival: air %.1f C, wind %d m/s from %03d, %s." % (
                    st.t_base + 8.0 + 4.0 * gauss_(rng), rng.randrange(1, 15),
                    (site.prevailing_deg + rng.randrange(-40, 41)) % 360,
                    rng.choice(("clear", "high cloud", "in cloud, visibility 50 m", "light snow"))),
                "",
                "Work done:",
            ]
            work = [w for w in WORK_ITEMS if w[1] is None or not w[1] or any(r in d for r in w[1])]
            for item, allowed in rng.sample(work, rng.randrange(3, 7)):
                role = rng.choice([r for r in allowed if r in d] if allowed else roles)
                L.append("  - " + item.format(
                    role=role, dev=d[role].dev_id, model=d[role].model, side=rng.choice(("north", "east", "west")),
                    n=4, k=rng.randrange(0, 4), mb=rng.randrange(40, 900), ohm=rng.uniform(10.0, 14.0),
                    mm=rng.uniform(0.2, 3.0), door=rng.choice("AB"), pct=rng.randrange(30, 95),
                    w1=rng.randrange(5, 60), w2=rng.randrange(120, st.panel_wp), fw=d[role].fw_new))
            L += ["", "Findings:"]
            for item in rng.sample(FINDINGS, rng.randrange(1, 4)):
                L.append("  - " + item.format(
                    d=rng.uniform(1.0, 9.0), p=rng.randrange(20, 200), n=rng.choice("AB"),
                    v=rng.uniform(12.4, 12.9), v2=rng.uniform(12.0, 12.4), role=rng.choice(roles),
                    deg=(site.prevailing_deg + rng.randrange(-20, 21)) % 360,
                    day=day_str(t - rng.randrange(5, 40) * DAY)))
            L += ["", "Check readings (station / travelling standard):"]
            ta = st.t_base + 8.0 + 3.0 * gauss_(rng)
            rh = rng.uniform(40.0, 95.0)
            p = site.p_base_hpa + 8.0 + 4.0 * gauss_(rng)
            for label, a, b, fmt in (
                ("air temperature C", ta, ta + 0.05 * gauss_(rng), "%8.2f"),
                ("humidity %", rh, rh + 0.8 * gauss_(rng), "%8.1f"),
                ("pressure hPa", p, p + 0.08 * gauss_(rng), "%8.2f"),
            ):
                L.append("  %-20s %s %s" % (label, fmt % a, fmt % b))
            L += ["", "Signed: %s" % names[team[0]], ""]
        out.append(("visits", "%s_visits_%d.txt" % (st.low, year), L))
    return out


# ---------------------------------------------------------------------------
# Assembly, split and output
# ---------------------------------------------------------------------------


def build_files(seed: int = DEFAULT_SEED, scale: float = 1.0) -> list:
    """All demo files as (kind, name, bytes), in a fixed order."""
    if not scale > 0:
        raise ValueError("scale must be positive")
    len_mult = min(scale, 1.0)
    count_mult = max(scale, 1.0)
    net = build_network(seed)
    items = []
    for st in net:
        rows = max(10, int(round(720 * len_mult)))
        items += telemetry_files(seed, st, max(1, int(round(2 * count_mult))), rows)
        items += event_files(seed, st, max(1, int(round(count_mult))), len_mult)
        items += gateway_log_files(seed, st, max(1, int(round(count_mult))), 3.6 * len_mult)
        if st.site.seismic:
            items += waveform_files(seed, st, max(1, int(round(count_mult))), len_mult)
        items.append(profile_file(seed, st))
        items += visits_files(seed, st, max(1, int(round(count_mult))), max(1, int(round(6 * len_mult))))
    for relay in sorted(RELAYS):
        items += relay_log_files(seed, relay, net, max(1, int(round(count_mult))), 3.0 * len_mult)
    files = []
    seen = set()
    for kind, name, lines in items:
        if name in seen:
            raise AssertionError("duplicate demo file name " + name)
        seen.add(name)
        files.append((kind, name, ("\n".join(lines) + "\n").encode("utf-8")))
    return files


def split_names(seed: int, files: list, test_fraction: float = TEST_FRACTION) -> set:
    """Names of the test files: within each kind, a seeded shuffle of the sorted names."""
    by_kind = {}
    for kind, name, _ in files:
        by_kind.setdefault(kind, []).append(name)
    test = set()
    for kind in sorted(by_kind):
        names = sorted(by_kind[kind])
        if len(names) < 2:
            continue
        random.Random("%d:split:%s" % (seed, kind)).shuffle(names)
        k = min(len(names) - 1, max(1, int(round(len(names) * test_fraction))))
        test.update(names[:k])
    return test


def clear_previous_run(out: Path, manifest_name: str = MANIFEST_NAME) -> None:
    """Remove the files a previous run listed in its manifest; refuse foreign files.
    (Shared with corpora/open_data.py, whose manifests use the same layout.)"""
    manifest = out / manifest_name
    if manifest.is_file():
        for line in manifest.read_text(encoding="utf-8", errors="surrogateescape").splitlines()[1:]:
            parts = line.split("\t")
            if len(parts) >= 2 and parts[0] in ("train", "test") and "/" not in parts[1]:
                p = out / parts[0] / parts[1]
                if p.is_file() and not p.is_symlink():
                    p.unlink()
    for sub in ("train", "test"):
        d = out / sub
        if d.exists() and any(d.iterdir()):
            raise FileExistsError("%s is not empty and its files are not from an earlier run; "
                                  "choose an empty OUT_DIR" % d)


def generate(out_dir, scale: float = 1.0, seed: int = DEFAULT_SEED) -> dict:
    """Write the demo corpus under out_dir/{train,test}; return a summary dict.

    The summary has keys seed, scale, train and test ({"files", "bytes"}) and kinds
    ({kind: {"train_files", "test_files", "bytes"}}).
    """
    out = Path(out_dir)
    files = build_files(seed, scale)
    test = split_names(seed, files)
    out.mkdir(parents=True, exist_ok=True)
    clear_previous_run(out)
    for sub in ("train", "test"):
        (out / sub).mkdir(exist_ok=True)
    summary = {"seed": seed, "scale": scale, "train": {"files": 0, "bytes": 0},
               "test": {"files": 0, "bytes": 0}, "kinds": {}}
    rows = []
    for kind, name, data in sorted(files, key=lambda x: x[1]):
        split = "test" if name in test else "train"
        (out / split / name).write_bytes(data)
        summary[split]["files"] += 1
        summary[split]["bytes"] += len(data)
        k = summary["kinds"].setdefault(kind, {"train_files": 0, "test_files": 0, "bytes": 0})
        k[split + "_files"] += 1
        k["bytes"] += len(data)
        rows.append("%s\t%s\t%s\t%d\t%s" % (split, name, kind, len(data), hashlib.sha256(data).hexdigest()))
    summary["kinds"] = {k: summary["kinds"][k] for k in sorted(summary["kinds"])}
    (out / MANIFEST_NAME).write_bytes(
        ("split\tname\tkind\tbytes\tsha256\n" + "\n".join(rows) + "\n").encode("utf-8"))
    return summary


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Write the invented VHSN demo corpus (train/ and test/).")
    ap.add_argument("out_dir", help="output folder; train/ and test/ are created in it")
    ap.add_argument("--scale", type=float, default=1.0,
                    help="size factor: <1 shrinks files, >1 adds files (default 1, about 3.6 MB)")
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of all random streams")
    args = ap.parse_args(argv)
    if not args.scale > 0:
        ap.error("--scale must be positive")
    s = generate(args.out_dir, scale=args.scale, seed=args.seed)
    print("demo corpus in %s (seed %d, scale %g)" % (args.out_dir, s["seed"], s["scale"]))
    for split in ("train", "test"):
        print("  %-5s %4d files %10d bytes" % (split, s[split]["files"], s[split]["bytes"]))
    for kind, k in s["kinds"].items():
        print("  %-12s train %3d  test %3d  %9d bytes" % (kind, k["train_files"], k["test_files"], k["bytes"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
