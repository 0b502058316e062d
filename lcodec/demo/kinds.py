"""The demo corpus's kinds of file: one generator per kind (telemetry, events, gateway
and relay logs, waveforms, profiles, visit reports), each a list of (kind, name, lines)
for one station or relay (demo/corpus.py lists the kinds and the determinism rules)."""
from __future__ import annotations

import json
import math
import random
from datetime import datetime

from .scenario import (DAY, EPOCH, FRAME_S, NETWORK, OPERATORS, PI, RELAYS, Station, TWO_PI, clip, cos_,
                       day_str, file_stamp, gauss_, hexstr, iso_ms, iso_s, log_stamp, sin_)
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
