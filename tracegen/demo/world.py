"""The invented world of the demo: sites, routes, sessions, simulated on a 40 ms radio step."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
from scipy.signal import lfilter

from .radio import (C_M_S, RADIO_STEP_S, SUB, _ar1, a3_next, fading_power_mean, gudmundson_shadowing_db,
                    log_distance_path_loss_db, shannon_capacity_bps)

CITY = "Port Quillon"
LAT0, LON0 = -41.2500, -23.6000  # open South Atlantic: an invented city must not land on a real one


# --- the invented world ---------------------------------------------------------------------------
def _lte_sites() -> dict[str, np.ndarray]:
    g = np.arange(4) * 700.0
    gx, gy = np.meshgrid(g, g)
    xy = np.vstack([np.c_[gx.ravel(), gy.ravel()],
                    [[350, 380], [1720, 330], [1080, 1760], [1760, 1420]],  # small cells at squares
                    [[50, -1300], [2150, -1350]]])                        # sparse riverside sites
    kind = np.array([0] * 16 + [1] * 4 + [2] * 2)
    names = [f"QN-M{i + 1:02d}" for i in range(16)] + [f"QN-S{i + 1}" for i in range(4)] + ["QN-R1", "QN-R2"]
    return {"xy": xy, "eirp_dbm": np.array([59.0, 35.0, 59.0])[kind], "height_m": np.array([25.0, 6.0, 32.0])[kind],
            "exponent": np.array([3.5, 3.0, 3.5])[kind], "k_factor": np.array([0.0, 2.0, 0.0])[kind],
            "channel": np.zeros(len(kind), dtype=np.int64), "grid": kind < 2, "names": np.array(names)}


CAMPUS_PATH = np.array([[2400, 600], [2580, 600], [2580, 720], [2820, 720], [2820, 660], [3000, 660]], float)


def _wifi_sites() -> dict[str, np.ndarray]:
    s = np.arange(0.0, 701.0, 50.0)  # the last ~80 m of the campus path has no AP: a coverage gap
    xy = _along(CAMPUS_PATH, s) + np.array([0.0, 7.0])
    n = len(s)
    return {"xy": xy, "eirp_dbm": np.full(n, 23.0), "height_m": np.full(n, 4.0), "exponent": np.full(n, 3.0),
            "k_factor": np.full(n, 2.5), "channel": np.arange(n) % 4, "grid": np.zeros(n, bool),
            "names": np.array([f"OMC-AP{i + 1:02d}" for i in range(n)])}


ACCESS = {
    "lte": dict(freq_hz=2.0e9, bw_hz=20e6, noise_dl_dbm=-174 + 73.0 + 7.0, noise_ul_dbm=-174 + 73.0 + 3.0,
                ue_eirp_dbm=23.0 + 13.0, sigma_db=8.0, decorr_m=50.0, eta=0.6, se_dl=4.4, se_ul=2.5,
                hyst_db=4.0, ttt_s=0.64, interrupt_s=(0.35, 0.9), fail=(0.015, 0.35), fail_out_s=(2.0, 6.0),
                qout_db=-8.0, m_freq=8.0, base_rtt_ms=(14.0, 32.0), sched_ms=9.0, users=(2.0, 3.0)),
    "wifi": dict(freq_hz=5.2e9, bw_hz=40e6, noise_dl_dbm=-174 + 76.0 + 7.0, noise_ul_dbm=-174 + 76.0 + 7.0,
                 ue_eirp_dbm=15.0 + 3.0, sigma_db=5.0, decorr_m=12.0, eta=0.75, se_dl=7.5, se_ul=7.5,
                 hyst_db=6.0, ttt_s=1.28, interrupt_s=(0.5, 1.2), fail=(0.03, 0.0), fail_out_s=(2.0, 5.0),
                 qout_db=-2.0, m_freq=4.0, base_rtt_ms=(3.0, 8.0), sched_ms=2.0, users=(2.0, 2.0)),
}
DISTRICTS = {"Saltmarket": (0, 1050, 0, 1050, (420, 300)), "Tinker Quay": (1050, 2100, 0, 1050, (1600, 500)),
             "Lanternhill": (0, 2100, 1050, 2100, (1500, 1600))}
RIVER_PATH = np.array([[-400, -820], [600, -760], [1300, -880], [2500, -800]], float)

PLAN_KEYS = ("fmt", "access", "mobility", "route", "place", "direction", "device")
TAG_KEYS = ("access", "mobility", "place", "direction", "device")
ARCHETYPES = (  # one cycle of twelve sessions, in PLAN_KEYS order
    ("csv", "lte", "walking", "street", "Tinker Quay", "downlink", "robot"),
    ("csv", "lte", "cart", "street", "Saltmarket", "downlink", "cart"),
    ("tsv", "lte", "docked", "dock", "Saltmarket", "uplink", "robot"),
    ("bytes", "wifi", "walking", "campus", "Old Mill Campus", "downlink", "robot"),
    ("rtcp", "lte", "cart", "street", "Lanternhill", "uplink", "cart"),
    ("csv", "lte", "cart", "river", "Heronbank", "downlink", "cart"),
    ("tsv", "wifi", "cart", "campus", "Old Mill Campus", "uplink", "cart"),
    ("ping", "lte", "walking", "street", "Tinker Quay", "uplink", "robot"),
    ("csv", "lte", "docked", "dock", "Lanternhill", "downlink", "robot"),
    ("bytes", "lte", "walking", "street", "Saltmarket", "uplink", "robot"),
    ("rtcp", "lte", "cart", "river", "Heronbank", "uplink", "cart"),
    ("csv", "wifi", "docked", "dock", "Old Mill Campus", "downlink", "robot"),
)
SPEED_M_S = {"docked": 0.0, "walking": 1.5, "cart": 6.0}


@dataclass(frozen=True)
class Session:
    """One simulated session: its plan, 1 s samples, ground truth and the radio-step physics behind them."""

    name: str
    plan: Mapping[str, str]            # fmt, access, mobility, route, place, direction, device
    device_id: str
    start_ms: int                      # Unix milliseconds of the first sample
    columns: Mapping[str, np.ndarray]  # 1 s samples: t_s, bandwidth_bps, rtt_ms, loss, jitter_ms, cell, lat, lon
    truth: Mapping[str, Any]
    radio: Mapping[str, np.ndarray]    # per radio step: sinr, alloc_hz, capacity_bps, avail
    extra: Mapping[str, Any]           # draws for the report writers (RTCP, ping)


def _along(path: np.ndarray, s: np.ndarray) -> np.ndarray:
    cum = np.concatenate(([0.0], np.cumsum(np.hypot(*np.diff(path, axis=0).T))))
    return np.c_[np.interp(s, cum, path[:, 0]), np.interp(s, cum, path[:, 1])]


def _fold(u: np.ndarray, lo: float, width: float) -> np.ndarray:
    """Reflect positions into [lo, lo + width]: the device turns back at a district's edge."""
    return lo + width - np.abs(np.mod(u - lo, 2 * width) - width)


def _route(route: str, place: str, speed: float, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Travelled distance (n,) and position (n, 2) in city metres for each radio step."""
    t = np.arange(n) * RADIO_STEP_S
    stop_at = np.cumsum(rng.exponential(70.0, 64))
    stop_len = rng.uniform(4.0, 20.0, 64)  # crossings, doorsteps, loading
    k = np.searchsorted(stop_at, t, side="right") - 1
    moving = (k < 0) | (t >= stop_at[np.maximum(k, 0)] + stop_len[np.maximum(k, 0)])
    v = speed * np.clip(1.0 + _ar1(rng, n, 1, 100.0, 0.12)[:, 0], 0.3, 1.6) * moving
    arc = np.concatenate(([0.0], np.cumsum(v[:-1]) * RADIO_STEP_S))
    if route == "dock":
        depot = DISTRICTS[place][4] if place in DISTRICTS else CAMPUS_PATH[0] + [20.0, -6.0]
        return arc, np.tile(np.asarray(depot, float), (n, 1))
    if route in ("river", "campus"):  # back and forth along a fixed path
        path = RIVER_PATH if route == "river" else CAMPUS_PATH
        length = float(np.sum(np.hypot(*np.diff(path, axis=0).T)))
        return arc, _along(path, _fold(rng.uniform(0, length) + arc, 0.0, length))
    x0, x1, y0, y1, _ = DISTRICTS[place]
    legs = int(arc[-1] // 100.0) + 3  # street blocks of 100-300 m, turning at corners
    heading = np.cumsum(rng.choice([-1, 0, 0, 1], legs)) + rng.integers(4)
    step = np.array([[1, 0], [0, 1], [-1, 0], [0, -1]])[heading % 4] * (100.0 * rng.integers(1, 4, legs))[:, None]
    start = np.array([rng.uniform(x0, x1), rng.uniform(y0, y1)])
    xy = _along(start + np.vstack([[0.0, 0.0], np.cumsum(step, axis=0)]), arc)
    return arc, np.c_[_fold(xy[:, 0], x0, x1 - x0), _fold(xy[:, 1], y0, y1 - y0)]


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    edges = np.flatnonzero(np.diff(np.concatenate(([0], mask.astype(np.int8), [0]))))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist()))


def simulate_session(plan: tuple, index: int, duration_s: float, rng: np.random.Generator) -> Session:
    """Simulate one session of the fleet (see the module docstring for the physics)."""
    fmt, access, mobility, route, place, direction, device = plan
    plan_map = dict(zip(PLAN_KEYS, plan))
    p = ACCESS[access]
    sites = _lte_sites() if access == "lte" else _wifi_sites()
    n_sec = max(2, int(round(duration_s)))
    n, m = n_sec * SUB, len(sites["xy"])
    day, tod_s = int(rng.integers(0, 5)), float(rng.uniform(7.5, 18.5)) * 3600.0
    start_ms = int(round((1778457600 + day * 86400 + tod_s) * 1000.0))  # 2026-05-11 UTC onwards

    arc, xy = _route(route, place, SPEED_M_S[mobility], n, rng)
    ue_h = 1.0 if device == "robot" else 1.6  # antenna heights count in the distance
    d = np.sqrt(np.sum((xy[:, None, :] - sites["xy"][None]) ** 2, axis=2) + (sites["height_m"] - ue_h) ** 2)
    loss_db = log_distance_path_loss_db(d, sites["exponent"][None], p["freq_hz"])
    loss_db = loss_db + np.where(sites["grid"], 14.0, 0.0) * (route == "river")  # river embankment blocks the grid
    # shadowing is half shared by all sites (the device's own surroundings) and half per link: an
    # inter-site correlation of 0.5, the usual assumption in system-level studies (from memory)
    shared = gudmundson_shadowing_db(arc, 1, p["sigma_db"], p["decorr_m"], rng)
    own = gudmundson_shadowing_db(arc, m, p["sigma_db"], p["decorr_m"], rng)
    loss_db = loss_db + np.sqrt(0.5) * shared + np.sqrt(0.5) * own
    loss_db = loss_db + _ar1(rng, n, m, 10.0 / RADIO_STEP_S, 1.0)  # people and vehicles moving nearby
    rsrp = sites["eirp_dbm"] - loss_db

    # users per cell: a lunchtime peak plus slow wandering of each cell's load
    hours = (tod_s + np.arange(n_sec)) / 3600.0
    diurnal = 0.6 + 0.9 * np.exp(-(((hours - 12.75) / 1.3) ** 2))
    base = rng.gamma(p["users"][0], p["users"][1], m)
    users = np.rint(base * diurnal[:, None] * np.exp(_ar1(rng, n_sec, m, 90.0, 0.35) - 0.06))
    users = np.repeat(users, SUB, axis=0)
    activity = 1.0 - np.exp(-(users + 0.5) / 3.0)  # share of a cell's resources busy, for interference
    rx, chan = 10.0 ** (rsrp / 10.0), sites["channel"]
    per_chan = np.stack([(rx * activity * (chan == c)).sum(axis=1) for c in range(int(chan.max()) + 1)], axis=1)
    noise = 10.0 ** (p["noise_dl_dbm"] / 10.0)

    def sinr_of(rows: np.ndarray, cells: np.ndarray) -> np.ndarray:
        own = rx[rows, cells]
        return own / (per_chan[rows, chan[cells]] - own * activity[rows, cells] + noise)

    # handovers: a loop over the few handover events, each scanning the rest of the session vectorised
    ttt, t = int(round(p["ttt_s"] / RADIO_STEP_S)), np.arange(n) * RADIO_STEP_S
    serving, avail, down, extra_rtt = np.empty(n, np.int64), np.ones(n), np.zeros(n, bool), np.zeros(n)
    s, i, handovers, failures, interruptions = int(np.argmax(rsrp[0])), 0, [], [], []
    while True:
        serving[i:] = s
        nxt = a3_next(rsrp, i, s, p["hyst_db"], ttt)
        if nxt is None:
            break
        j, target = nxt
        sinr_db = 10 * np.log10(sinr_of(np.array([j]), np.array([s]))[0])
        p_fail = p["fail"][0] + p["fail"][1] / (1.0 + np.exp((sinr_db + 7.0) / 1.5))  # too-late handovers fail
        if rng.random() < p_fail:
            k = min(n, j + int(round(rng.uniform(*p["fail_out_s"]) / RADIO_STEP_S)))
            failures.append(round(t[j], 3))
            down[j:k], serving[j:k] = True, -1
            if k >= n:
                break
            s, i = int(np.argmax(rsrp[k])), k  # re-establishment on the strongest cell
        else:
            gap = rng.uniform(*p["interrupt_s"])
            span = slice(j, min(n, j + int(np.ceil(gap / RADIO_STEP_S)) + 1))
            overlap = np.clip(np.minimum(t[span] + RADIO_STEP_S, t[j] + gap) - t[span], 0, RADIO_STEP_S)
            avail[span] *= 1.0 - overlap / RADIO_STEP_S
            extra_rtt[j:j + SUB] += 500.0 * gap  # packets held during the interruption wait half of it on average
            handovers.append(round(t[j], 3))
            interruptions.append([round(t[j], 3), float(np.floor((t[j] + gap) * 1000) / 1000), "handover interruption"])
            s, i = target, j

    conn, cell, rows = np.flatnonzero(serving >= 0), np.maximum(serving, 0), np.arange(n)
    speed = np.concatenate((np.diff(arc), [0.0])) / RADIO_STEP_S
    n_avg = p["m_freq"] * (1.0 + 2.0 * speed * RADIO_STEP_S * p["freq_hz"] / C_M_S)  # frequency x time diversity
    fade = fading_power_mean(rng, sites["k_factor"][cell], n_avg)
    # other users' traffic is bursty: each is backlogged on ~60 % of radio steps
    share = 1.0 / (rng.binomial(users[rows, cell].astype(np.int64), 0.6) + 1.0)
    sinr = sinr_of(rows, cell)
    # radio link monitoring on the downlink (Qout over ~200 ms), whichever way the data flows
    coverage = (10 * np.log10(np.convolve(sinr * fade, np.ones(5) / 5, mode="same")) < p["qout_db"]) & ~down
    if direction == "uplink":  # the device's power is concentrated on its share of the band
        iot = 10.0 ** ((2.0 + 4.0 * activity.mean(axis=1)) / 10.0)
        n_ul = 10.0 ** (p["noise_ul_dbm"] / 10.0) * iot
        sinr = 10.0 ** ((p["ue_eirp_dbm"] - loss_db[rows, cell]) / 10.0) / (share * n_ul)
    sinr, alloc = sinr * fade, share * p["bw_hz"]
    mac = 0.7 / (1.0 + 0.04 * users[rows, cell]) if access == "wifi" else 1.0  # contention overhead
    capacity = mac * shannon_capacity_bps(alloc, sinr, p["eta"], p["se_dl" if direction == "downlink" else "se_ul"])
    down |= coverage
    avail[down] = 0.0

    # delay, loss, jitter on the radio step, then to 1 s samples
    base_rtt = rng.uniform(*p["base_rtt_ms"])
    harq = 8.0 * (0.1 + 0.5 / (1.0 + np.exp((10 * np.log10(sinr) + 2.0) / 2.0)))
    rho = np.minimum(0.9, users[rows, cell] / (users[rows, cell] + 4.0))
    backlog = 40e3 * (1.0 + 2.0 * rho / (1.0 - rho)) * np.exp(_ar1(rng, n, 1, 5.0 / RADIO_STEP_S, 0.5)[:, 0])
    queue = np.minimum(2000.0, 1000.0 * backlog / np.maximum(capacity, 50e3))
    rtt = base_rtt + p["sched_ms"] + harq + queue + extra_rtt
    loss_up = np.minimum(1.0, 0.001 + 0.25 / (1.0 + np.exp((10 * np.log10(sinr) + 4.0) / 1.2))
                         + 0.03 * np.maximum(0.0, rho - 0.8) / 0.1)
    transit = rtt / 2 + rng.gamma(2.0, (0.8 + 0.05 * queue) / 2.0)
    dd = np.abs(np.diff(transit, prepend=transit[0])) * ~down
    jit = lfilter([1.0 / 16.0], [1.0, -15.0 / 16.0], dd)  # RFC 3550 A.8: J += (|D| - J) / 16

    def per_sec(a: np.ndarray) -> np.ndarray:
        return a.reshape(n_sec, SUB)

    up_w = per_sec(avail)
    dead = up_w.sum(1) == 0
    rtt_s = np.where(dead, np.nan, (per_sec(rtt) * up_w).sum(1) / np.maximum(up_w.sum(1), 1e-12))
    first, names = serving[::SUB], sites["names"]
    cols = {"t_s": np.arange(n_sec, dtype=float), "bandwidth_bps": per_sec(capacity * avail).mean(1),
            "rtt_ms": rtt_s, "loss": per_sec(np.where(down, 1.0, loss_up)).mean(1),
            "jitter_ms": np.where(dead, np.nan, per_sec(jit)[:, -1]),
            "cell": np.where(first >= 0, names[np.maximum(first, 0)], None),
            "lat": LAT0 + xy[::SUB, 1] / 111_320.0,  # metres to degrees, locally
            "lon": LON0 + xy[::SUB, 0] / (111_320.0 * np.cos(np.radians(LAT0)))}

    visited = names[serving[conn]]
    keep = np.concatenate(([True], visited[1:] != visited[:-1])) if visited.size else np.zeros(0, bool)
    outages = [[round(t[a], 3), round(t[b - 1] + RADIO_STEP_S, 3),
                "coverage" if coverage[a:b].all() else "handover failure"] for a, b in _runs(down)]
    outages = sorted(outages + interruptions)
    ids = {"robot": [f"QR-{k:03d}" for k in (101, 104, 117, 122, 130, 146, 152, 168)],
           "cart": [f"QC-{k:02d}" for k in (3, 8, 11, 19)]}[device]
    extra = {"report_offset_s": rng.uniform(0.3, 0.7, n_sec), "dlsr_units": rng.integers(3000, 60000, n_sec),
             "probe_lost": rng.random(n_sec) < cols["loss"], "ssrc": int(rng.integers(1, 2**32)),
             "seq0": int(rng.integers(0, 2**16)), "ttl": int(rng.integers(50, 61))}
    name = f"qn{index + 1:02d}-{place.lower().replace(' ', '-')}-{mobility}-{access}-{direction[:2]}"
    truth = {**plan_map, "handovers_s": handovers, "handover_failures_s": failures, "outages": outages,
             "cells": visited[keep].tolist(), "duration_s": float(n_sec), "step_s": 1.0, "first_sample_s": 0.0}
    if fmt == "rtcp" and np.isfinite(rtt_s).any():  # the reader's time starts at the first report's arrival
        k0 = int(np.flatnonzero(np.isfinite(rtt_s))[0])
        truth["first_sample_s"] = round(k0 + float(extra["report_offset_s"][k0]), 6)
    radio = {"sinr": sinr, "alloc_hz": alloc, "capacity_bps": capacity, "avail": avail}
    return Session(name, plan_map, str(rng.choice(ids)), start_ms, cols, truth, radio, extra)


def simulate_fleet(seed: int = 7, sessions: int = 36, duration_s: float = 300,
                   progress: bool | None = None) -> list[Session]:
    """All sessions of the demo, from one Generator made from ``seed``."""
    from ..progress import bar

    rng = np.random.default_rng(seed)  # the one source of randomness of the demo
    with bar(range(sessions), label=f"simulating {sessions} sessions", enabled=progress) as items:
        return [simulate_session(ARCHETYPES[i % len(ARCHETYPES)], i, duration_s, rng) for i in items]
