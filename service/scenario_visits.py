"""When benign customers visit, from which device and address, and which hard case each visit is.

A visit's segment names the hardest benign case it belongs to, by precedence: promotion day,
campus network, shared family tablet, newly replaced phone, VPN, rotating IPv6 privacy address,
mobile carrier pool; plain "benign" otherwise.
"""

from __future__ import annotations

import numpy as np

from service.scenario_benign import _G, Households, Population, plan_counts
from service.scenario_events import (
    LEAD_NONE,
    LOGIN,
    SEG,
    SIGNUP,
    Addresses,
    Sessions,
    checkout_counts,
)
from service.scenario_net import hosts_in_16
from service.scenario_params import ScenarioParams
from service.scenario_phone import UTC_OFFSETS_H
from service.scenario_time import MS_PER_DAY, MS_PER_HOUR
from service.scenario_world import World

_Spec = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]


def _regular(world: World, p: ScenarioParams, pop: Population) -> _Spec:
    """Sessions at each account's own rate, from sign-up (or the stream start) to the end."""
    rng, clock = world.rng, world.clock
    begin = np.where(pop.created_ms < 0, clock.start_ms, pop.created_ms + MS_PER_HOUR)
    active_days = np.maximum(clock.end_ms - begin, 0) / MS_PER_DAY
    who = np.repeat(np.arange(len(pop.account)), rng.poisson(pop.rate * active_days))
    ts = clock.sample_by_offset(rng, UTC_OFFSETS_H[pop.region[who]], begin[who])
    lead = np.where(rng.random(len(who)) < p.login_share, LOGIN, LEAD_NONE)
    n_co = checkout_counts(rng, len(who), p.checkout_probs)
    lead = np.where((lead == LEAD_NONE) & (n_co == 0), LOGIN, lead)
    day = (ts - clock.start_ms) // MS_PER_DAY
    promo = (pop.group[who] == _G["promo"]) & (day == p.promo_day)
    return ts, who, lead, n_co, promo, np.zeros(len(who), dtype=bool)


def _signups(world: World, p: ScenarioParams, pop: Population) -> _Spec:
    """The sign-up visit of every new account, often with a first purchase."""
    rng = world.rng
    who = np.flatnonzero(pop.created_ms >= 0)
    group = pop.group[who]
    share = np.where(group == _G["promo"], 0.8, p.first_checkout_share)
    share = np.where(group == _G["campus_wave"], 0.15, share)
    n_co = (rng.random(len(who)) < share).astype(np.int64)
    lead = np.full(len(who), SIGNUP)
    return pop.created_ms[who], who, lead, n_co, group == _G["promo"], group == _G["campus_wave"]


def _promo_extra(world: World, p: ScenarioParams, pop: Population) -> _Spec:
    """Established customers shopping the promotion: extra checkout visits on the day."""
    rng, clock = world.rng, world.clock
    pool = np.flatnonzero(pop.group == _G["established"])
    n = plan_counts(p)["promo_sessions"]
    weight = pop.rate[pool] / pop.rate[pool].sum()
    who = pool[rng.choice(len(pool), size=n, p=weight)]
    day_start = clock.start_ms + p.promo_day * MS_PER_DAY
    ts = clock.sample_by_offset(
        rng, UTC_OFFSETS_H[pop.region[who]], day_start, day_start + MS_PER_DAY
    )
    lead = np.where(rng.random(n) < 0.85, LOGIN, LEAD_NONE)
    n_co = checkout_counts(rng, n, (0.0, 0.8, 0.2))
    return ts, who, lead, n_co, np.ones(n, dtype=bool), np.zeros(n, dtype=bool)


def _household_address(
    world: World, hh: Households, h: np.ndarray, device: np.ndarray, ts: np.ndarray
) -> tuple[Addresses, np.ndarray]:
    """IPv6 privacy address (new per device per day) on the household /64 where it has IPv6,
    else the household's IPv4, which changes when its lease does."""
    n = len(h)
    v6 = (hh.v6_hi[h] != 0) & (world.rng.random(n) < 0.85)
    day = (ts - world.clock.start_ms) // MS_PER_DAY
    ip = Addresses.empty(n)
    ip.ver[:] = np.where(v6, 6, 4)
    ip.hi[:] = np.where(v6, hh.v6_hi[h], 0)
    lease_draw = world.hash(np.ones(n), h, (ts + hh.phase_ms[h]) // hh.lease_ms[h])
    for k, blocks in enumerate(world.nets.isp_v4):
        sel = ~v6 & (hh.isp[h] == k)
        ip.lo[sel] = hosts_in_16(blocks, lease_draw[sel])
    ip.lo[v6] = world.hash(np.full(n, 2), h, device + 1, day)[v6]
    return ip, v6


def _device(
    world: World,
    p: ScenarioParams,
    pop: Population,
    who: np.ndarray,
    ts: np.ndarray,
    mobile: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """The device of each visit (the phone on mobile data), and whether it is a new phone."""
    rng, n = world.rng, len(who)
    slot = np.where(mobile, 0, (rng.random(n)[:, None] > pop.dev_weights[who]).sum(axis=1))
    device = pop.devices[who, slot]
    changed = (slot == 0) & (ts >= pop.change_ms[who])
    device = np.where(changed, pop.new_phone[who], device)
    device[rng.random(n) < p.no_device_share] = -1
    return device, changed


def _place(
    world: World, p: ScenarioParams, pop: Population, hh: Households, spec: _Spec
) -> Sessions:
    ts, who, lead, n_co, promo, force_campus = spec
    rng, nets, n = world.rng, world.nets, len(ts)
    campus = pop.campus[who]
    vpn = (rng.random(n) < pop.p_vpn[who]) & ~force_campus
    mobile = ~vpn & (rng.random(n) < pop.p_mobile[who]) & ~force_campus
    home = ~vpn & ~mobile
    device, changed = _device(world, p, pop, who, ts, mobile)
    ip = Addresses.empty(n)
    ip.put(vpn, Addresses.v4(nets.vpn_exits[rng.integers(0, len(nets.vpn_exits), int(vpn.sum()))]))
    ip.put(mobile, world.carrier_address(pop.carrier[who[mobile]]))
    on_campus = home & campus
    nat = nets.campus_nat[rng.integers(0, len(nets.campus_nat), int(on_campus.sum()))]
    ip.put(on_campus, Addresses.v4(nat))
    at_home = home & ~campus
    home_ip, v6 = _household_address(
        world, hh, pop.household[who[at_home]], device[at_home], ts[at_home]
    )
    ip.put(at_home, home_ip)
    is_v6 = np.zeros(n, dtype=bool)
    is_v6[at_home] = v6
    segment = np.full(n, SEG["benign"], dtype=np.int16)
    for name, mask in (
        ("benign:carrier", mobile), ("benign:ipv6_privacy", is_v6), ("benign:vpn", vpn),
        ("benign:new_device", changed & (device >= 0)),
        ("benign:shared_device", (device >= 0) & (device == pop.devices[who, 3])),
        ("benign:campus", on_campus), ("benign:promo", promo),
    ):  # fmt: skip
        segment[mask] = SEG[name]
    return Sessions.make(ts, pop.account[who], lead, n_co, device, ip, segment)


def benign_sessions(world: World, p: ScenarioParams, pop: Population, hh: Households) -> Sessions:
    """Every visit of every benign customer, in no particular order."""
    specs = [_signups(world, p, pop), _regular(world, p, pop), _promo_extra(world, p, pop)]
    merged = tuple(np.concatenate([s[k] for s in specs]) for k in range(6))
    return _place(world, p, pop, hh, merged)  # type: ignore[arg-type]
