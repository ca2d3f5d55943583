"""Four attack shapes, each linked by something different, written as sessions like benign ones.

- device_farm: a few devices reused across many new accounts, in waves of a few hours.
- proxy_rotation: a fresh device per account, every visit from another residential or mobile
  address, mail on throwaway domains that appear with the campaign.
- slow_campaign: a few accounts a day for weeks, each ordinary alone; linked only by one phone
  block, one hosting network and partly one small domain. Built to stay under velocity rules.
- takeover: established customers' accounts suddenly used from a crew's few devices and networks
  for high-value checkouts; the victim's e-mail and phone stay as they were.

The numbers (sizes, timings, amounts) are invented; the shapes are common practice, no source.
"""

from __future__ import annotations

import numpy as np

from service.scenario_benign import _G, Population
from service.scenario_events import (
    LOGIN,
    SEG,
    SIGNUP,
    Addresses,
    EventBatch,
    Sessions,
    checkout_counts,
    expand,
    lognormal_amounts,
    uniform_amounts,
)
from service.scenario_params import ScenarioParams
from service.scenario_phone import COUNTRY_SHARES
from service.scenario_time import MS_PER_DAY, MS_PER_HOUR, MS_PER_MIN
from service.scenario_world import World

# Hosting networks (indices into Networks.hosting): 0 and 7 are on the rules' incident list;
# the VPN that benign users pay for also exits in 0, 3 and 4.
_FARM_NETS, _SLOW_NETS, _CREW_NETS = (0, 1, 2), (3, 4), (5, 6)
INCIDENT_NETWORKS = (0, 7)


def _accounts(
    world: World, n: int, no_phone: float, domains: list[str] | None = None
) -> np.ndarray:
    """New attacker-made accounts, with identities drawn like everyone else's."""
    rng = world.rng
    region = np.where(
        rng.random(n) < 0.7, 0, rng.choice(len(COUNTRY_SHARES), size=n, p=COUNTRY_SHARES)
    )
    isp = rng.integers(0, len(world.nets.isp_v4), n)
    emails, phones = world.identities(region, isp, no_phone)
    if domains is not None:
        emails = world.mail.addresses(domains)
    return world.add_accounts(emails, phones)


def _mixed_domains(world: World, n: int, own: list[str], own_share: float) -> list[str]:
    """Domains for `n` accounts: a share on the attacker's `own` domains, the rest as anyone's."""
    rng = world.rng
    common = world.domains.draw(rng.integers(0, len(world.nets.isp_v4), n))
    pick = rng.integers(0, len(own), n)
    return [
        own[k] if u < own_share else d for d, k, u in zip(common, pick, rng.random(n), strict=True)
    ]


def _residential_24(world: World, k: int) -> np.ndarray:
    """`k` hosts in one residential /24 (a compromised or rented home line)."""
    base = (world.residential(1).lo[0] >> np.uint64(8)) << np.uint64(8)
    hosts = world.rng.choice(254, size=k, replace=False).astype(np.uint64) + np.uint64(1)
    return np.asarray(base + hosts, dtype=np.uint64)


def _residential_v6(world: World, n: int) -> Addresses:
    """Random addresses in random /64s of the IPv6-capable ISPs (proxied home lines)."""
    prefixes = world.nets.isp_v6[world.nets.isp_v6 != 0]
    top = prefixes[world.rng.integers(0, len(prefixes), n)] << np.uint64(32)
    hi = top | (world.draw(n) >> np.uint64(32))
    return Addresses(np.full(n, 6, np.int8), hi.astype(np.uint64), world.draw(n) << np.uint64(2))


def device_farm(world: World, p: ScenarioParams, budget: float) -> EventBatch:
    rng, clock = world.rng, world.clock
    n = max(5, round(budget / 3.3))
    farm = world.new_devices(max(3, -(-n // p.farm_accounts_per_device)))
    days = np.sort(
        rng.choice(np.arange(2, p.days - 2), size=min(p.farm_waves, p.days - 4), replace=False)
    )
    wave_start = clock.start_ms + days * MS_PER_DAY + rng.integers(9, 20, len(days)) * MS_PER_HOUR
    wave_len = rng.integers(3, 7, len(days)) * MS_PER_HOUR
    nets = [
        _FARM_NETS[w % 3] for w in range(len(days))
    ]  # the first wave returns to a listed network
    wave_ips = [world.hosting_hosts(h, 4) if w % 4 != 3 else _residential_24(world, 4)
                for w, h in enumerate(nets)]  # fmt: skip
    wave = rng.integers(0, len(days), n)
    account = _accounts(world, n, 0.45, _mixed_domains(world, n, world.incident_domains[:1], 0.2))
    device = farm[rng.integers(0, len(farm), n)]
    t0 = wave_start[wave] + (rng.random(n) * wave_len[wave]).astype(np.int64)
    follow = rng.random(n) < 0.3
    ts = np.concatenate(
        [t0, t0[follow] + rng.integers(MS_PER_DAY, 3 * MS_PER_DAY, int(follow.sum()))]
    )
    who = np.concatenate([np.arange(n), np.flatnonzero(follow)])
    ips = np.array([wave_ips[w][rng.integers(0, 4)] for w in wave[who]], dtype=np.uint64)
    lead = np.concatenate([np.full(n, SIGNUP), np.full(int(follow.sum()), LOGIN)])
    n_co = np.concatenate(
        [checkout_counts(rng, n, (0.0, 0.45, 0.4, 0.15)), np.ones(int(follow.sum()))]
    )
    s = Sessions.make(
        ts, account[who], lead, n_co, device[who], Addresses.v4(ips), SEG["attack:device_farm"]
    )
    return expand(rng, s, lognormal_amounts(110.0, 0.7))


def proxy_rotation(world: World, p: ScenarioParams, budget: float) -> EventBatch:
    rng, clock = world.rng, world.clock
    n = max(5, round(budget / 2.7))
    k = p.proxy_campaigns
    start = clock.start_ms + rng.integers(3, p.days - 4, k) * MS_PER_DAY
    length = rng.integers(24, 61, k) * MS_PER_HOUR
    camp = rng.integers(0, k, n)
    own = [world.domains.new_small_domains(int(rng.integers(1, 3))) for _ in range(k)]
    mine = [own[c][int(rng.integers(0, len(own[c])))] for c in camp]
    common = world.domains.draw(rng.integers(0, len(world.nets.isp_v4), n))
    domains = [d if u < 0.75 else c for d, c, u in zip(mine, common, rng.random(n), strict=True)]
    account = _accounts(world, n, 0.65, domains)
    t0 = clock.profile(1).sample(rng, n, start[camp], start[camp] + length[camp])
    follow = rng.random(n) < 0.25
    m = int(follow.sum())
    ts = np.concatenate([t0, t0[follow] + rng.integers(10 * MS_PER_MIN, 6 * MS_PER_HOUR, m)])
    who = np.concatenate([np.arange(n), np.flatnonzero(follow)])
    device = world.new_devices(n)[who]
    device[rng.random(len(who)) < 0.05] = -1
    ip = world.residential(len(who))
    route = rng.random(len(who))
    on_mobile, on_v6 = route < 0.15, route > 0.9
    ip.put(on_mobile, world.carrier_address(rng.integers(0, 4, int(on_mobile.sum()))))
    ip.put(on_v6, _residential_v6(world, int(on_v6.sum())))
    lead = np.concatenate([np.full(n, SIGNUP), np.full(m, LOGIN)])
    n_co = np.concatenate([checkout_counts(rng, n, (0.1, 0.6, 0.3)), np.ones(m)])
    s = Sessions.make(ts, account[who], lead, n_co, device, ip, SEG["attack:proxy_rotation"])
    return expand(rng, s, lognormal_amounts(160.0, 0.6))


def slow_campaign(world: World, p: ScenarioParams, budget: float) -> EventBatch:
    rng, clock = world.rng, world.clock
    n = max(3, round(budget / 5.0))
    lo = clock.start_ms + p.slow_start_day * MS_PER_DAY
    hi = min(lo + p.slow_days * MS_PER_DAY, clock.end_ms - 5 * MS_PER_DAY)
    domains = _mixed_domains(world, n, world.domains.new_small_domains(1), 0.4)
    emails = world.mail.addresses(domains)
    account = world.add_accounts(emails, list(world.phones.block("GB", n)))
    t0 = clock.profile(1).sample(rng, n, lo, hi)
    home = np.concatenate([world.hosting_hosts(h, 254) for h in _SLOW_NETS])
    home_ip = home[rng.integers(0, len(home), n)]
    n_visits = rng.integers(1, 3, n)
    visit_of = np.repeat(np.arange(n), n_visits)
    visit_t = t0[visit_of] + rng.integers(7 * MS_PER_HOUR, 3 * MS_PER_DAY, len(visit_of))
    buy_t = t0 + rng.integers(36 * MS_PER_HOUR, 5 * MS_PER_DAY, n)
    who = np.concatenate([np.arange(n), visit_of, np.arange(n)])
    ts = np.concatenate([t0, visit_t, buy_t])
    lead = np.concatenate([np.full(n, SIGNUP), np.full(len(visit_of) + n, LOGIN)])
    browse_buys = (rng.random(len(visit_of)) < 0.3).astype(int)
    n_co = np.concatenate([np.zeros(n), browse_buys, checkout_counts(rng, n, (0, 0.6, 0.4))])
    ip = Addresses.v4(home_ip[who])
    on_mobile = rng.random(len(who)) < 0.3
    ip.put(on_mobile, world.carrier_address(rng.integers(0, 4, int(on_mobile.sum()))))
    device = world.new_devices(n)[who]
    s = Sessions.make(ts, account[who], lead, n_co, device, ip, SEG["attack:slow_campaign"])
    return expand(rng, s, lognormal_amounts(240.0, 0.45))


def _victims(
    world: World, pop: Population, benign: Sessions, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Established customers with at least three visits so far, and when each is taken over."""
    rng, clock = world.rng, world.clock
    eligible = pop.account[pop.group == _G["established"]]
    mine = np.isin(benign.account, eligible)
    order = np.lexsort((benign.ts_ms[mine], benign.account[mine]))
    acc, ts = benign.account[mine][order], benign.ts_ms[mine][order]
    first = np.searchsorted(acc, acc, side="left")
    third = (np.arange(len(acc)) - first) == 2
    cand, since = acc[third], ts[third] + MS_PER_HOUR
    latest = clock.end_ms - 2 * MS_PER_HOUR
    ok = since < latest - MS_PER_DAY
    cand, since = cand[ok], since[ok]
    pick = rng.choice(len(cand), size=min(n, len(cand)), replace=False)
    when = since[pick] + (rng.random(len(pick)) * (latest - since[pick])).astype(np.int64)
    return cand[pick], when


def takeover(
    world: World, p: ScenarioParams, budget: float, pop: Population, benign: Sessions
) -> EventBatch:
    rng = world.rng
    victims, ts = _victims(world, pop, benign, max(3, round(budget / 2.85)))
    n = len(victims)
    crew = world.new_devices(max(3, -(-n // p.takeover_victims_per_device)))
    addresses = np.concatenate(
        [world.hosting_hosts(h, 4) for h in _CREW_NETS] + [_residential_24(world, 4)]
    )
    device = crew[rng.integers(0, len(crew), n)]
    ip = Addresses.v4(addresses[rng.integers(0, len(addresses), n)])
    n_co = checkout_counts(rng, n, (0.0, 0.35, 0.45, 0.2))
    s = Sessions.make(ts, victims, LOGIN, n_co, device, ip, SEG["attack:takeover"])
    hi_value, over_cap = uniform_amounts(350.0, 1950.0), uniform_amounts(2000.0, 3500.0)

    def amounts(r: np.random.Generator, k: int) -> np.ndarray:
        return np.asarray(np.where(r.random(k) < 0.9, hi_value(r, k), over_cap(r, k)))

    return expand(rng, s, amounts)


def attack_events(
    world: World, p: ScenarioParams, pop: Population, benign: Sessions
) -> list[EventBatch]:
    """All attack events, each shape given its share of the fraud budget."""
    total = sum(p.attack_mix.values())
    budget = {k: p.fraud_share * p.n_events * v / total for k, v in p.attack_mix.items()}
    out = []
    for shape, make in (("device_farm", device_farm), ("proxy_rotation", proxy_rotation),
                        ("slow_campaign", slow_campaign)):  # fmt: skip
        if budget.get(shape, 0.0) > 0:
            out.append(make(world, p, budget[shape]))
    if budget.get("takeover", 0.0) > 0:
        out.append(takeover(world, p, budget["takeover"], pop, benign))
    return out
