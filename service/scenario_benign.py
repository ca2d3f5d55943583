"""The marketplace's real customers: who they are, where they connect from, when they shop.

Established customers (accounts older than the stream) log in and check out repeatedly; new
customers sign up in a steady trickle. Households share a broadband line: IPv4 that changes only
when the lease does, or an IPv6 /64 whose privacy addresses rotate daily (RFC 8981). Phones roam
on carrier pools shared by many users. Hard cases a good scorer must not flag are part of the
population: a promotion day, a campus behind a few NAT addresses with a sign-up wave, VPN users,
shared family tablets and people who change phones.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.scenario_params import ScenarioParams
from service.scenario_phone import COUNTRY_SHARES, UTC_OFFSETS_H
from service.scenario_time import MS_PER_DAY, MS_PER_HOUR
from service.scenario_world import World

GROUPS = ("established", "new", "promo", "campus_established", "campus_new", "campus_wave")
_G = {g: i for i, g in enumerate(GROUPS)}
_NEVER = np.iinfo(np.int64).max


@dataclass
class Population:
    """Benign accounts, one row each (`account` is the global index)."""

    account: np.ndarray
    group: np.ndarray
    region: np.ndarray
    household: np.ndarray  # -1 for campus accounts
    created_ms: np.ndarray  # -1 for accounts created before the stream
    rate: np.ndarray  # sessions per day
    p_mobile: np.ndarray
    p_vpn: np.ndarray
    carrier: np.ndarray
    devices: np.ndarray  # (n, 4): own devices in slots 0-2 (0 is the phone), shared tablet in 3
    dev_weights: np.ndarray  # (n, 4) cumulative choice weights
    change_ms: np.ndarray  # when the phone (slot 0) was replaced; _NEVER if not
    new_phone: np.ndarray  # the replacement device

    @property
    def campus(self) -> np.ndarray:
        return np.isin(self.group, [_G["campus_established"], _G["campus_new"], _G["campus_wave"]])


@dataclass
class Households:
    region: np.ndarray
    isp: np.ndarray
    lease_ms: np.ndarray
    phase_ms: np.ndarray
    v6_hi: np.ndarray  # uint64 /64 prefix; 0 for IPv4-only households


def plan_counts(p: ScenarioParams) -> dict[str, int]:
    """How many accounts of each group give about the requested number of benign events."""
    budget = p.n_events * (1.0 - p.fraud_share)
    mean_co = float(np.dot(np.arange(3), p.checkout_probs) / sum(p.checkout_probs))
    per_session = p.login_share + (1 - p.login_share) * p.checkout_probs[0] + mean_co
    per_new = 1 + p.first_checkout_share + 0.6 * p.sessions_per_day * p.days / 2 * per_session
    daily_signups = p.signup_share * budget / p.days
    n_new = round(daily_signups * p.days)
    n_promo = round((p.promo_multiplier - 1) * daily_signups)
    n_wave = round(p.campus_wave_signups * p.scale)
    daily_checkouts = budget * mean_co / per_session / p.days
    promo_sessions = max(0, round((p.promo_multiplier - 1) * daily_checkouts / 1.2) - n_promo)
    rest = budget - (n_new + n_promo + n_wave) * per_new - promo_sessions * 2.05
    n_est = max(100, round(rest / (p.sessions_per_day * p.days * per_session)))
    n_campus = round(p.campus_accounts * p.scale)
    return {
        "established": n_est - round(0.6 * n_campus),
        "new": n_new - round(0.4 * n_campus),
        "promo": n_promo,
        "campus_established": round(0.6 * n_campus),
        "campus_new": round(0.4 * n_campus),
        "campus_wave": n_wave,
        "promo_sessions": promo_sessions,
    }


def _rates(rng: np.random.Generator, p: ScenarioParams, established: np.ndarray) -> np.ndarray:
    """Sessions per day: lognormal around the configured mean for established customers; new
    ones come back less, and a third of them never return after signing up."""
    sigma, n = 1.0, len(established)
    rate = rng.lognormal(np.log(p.sessions_per_day) - sigma**2 / 2, sigma, n)
    returning = rng.random(n) >= 0.35
    return np.asarray(np.where(established, rate, np.where(returning, 0.6 * rate / 0.65, 0.0)))


def _households(world: World, p: ScenarioParams, n: int) -> tuple[np.ndarray, Households]:
    """Group `n` accounts into households of one to three; returns each account's household."""
    rng = world.rng
    sizes = rng.choice([1, 2, 3], size=n, p=[0.72, 0.2, 0.08])
    sizes = sizes[: int(np.searchsorted(np.cumsum(sizes), n)) + 1]
    member_of = np.repeat(np.arange(len(sizes)), sizes)[:n]
    member_of = member_of[rng.permutation(n)]
    h = len(sizes)
    isp = rng.integers(0, len(world.nets.isp_v4), h)
    isp_v6 = world.nets.isp_v6[isp]
    with_v6 = (isp_v6 != 0) & (rng.random(h) < min(1.0, p.ipv6_household_share / 0.6))
    v6_hi = np.where(with_v6, (isp_v6 << np.uint64(32)) | world.draw(h) >> np.uint64(32), 0)
    lease = np.maximum(rng.lognormal(np.log(20.0), 0.8, h), 1.0) * MS_PER_DAY
    return member_of, Households(
        region=rng.choice(len(COUNTRY_SHARES), size=h, p=COUNTRY_SHARES),
        isp=isp,
        lease_ms=lease.astype(np.int64),
        phase_ms=rng.integers(0, MS_PER_DAY * 60, h),
        v6_hi=v6_hi.astype(np.uint64),
    )


def _created(world: World, p: ScenarioParams, group: np.ndarray, region: np.ndarray) -> np.ndarray:
    clock, rng = world.clock, world.rng
    created = np.full(len(group), -1, dtype=np.int64)
    offsets = UTC_OFFSETS_H[region]
    windows = {
        "new": (clock.start_ms, clock.end_ms),
        "campus_new": (clock.start_ms, clock.end_ms),
        "promo": (clock.start_ms + p.promo_day * MS_PER_DAY,
                  clock.start_ms + (p.promo_day + 1) * MS_PER_DAY),
        # A freshers' fair stall: 13:00 to 16:00 UK time (UTC+1).
        "campus_wave": (clock.start_ms + p.campus_wave_day * MS_PER_DAY + 12 * MS_PER_HOUR,
                        clock.start_ms + p.campus_wave_day * MS_PER_DAY + 15 * MS_PER_HOUR),
    }  # fmt: skip
    for name, (lo, hi) in windows.items():
        sel = group == _G[name]
        created[sel] = clock.sample_by_offset(rng, offsets[sel], lo, hi)
    return created


def _devices(
    world: World, p: ScenarioParams, member_of: np.ndarray, n_hh: int, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Own devices (one to three), a shared family tablet for some households, phone changes."""
    rng = world.rng
    count = rng.choice([1, 2, 3], size=n, p=[0.55, 0.35, 0.10])
    devices = np.full((n, 4), -1, dtype=np.int64)
    own = world.new_devices(int(count.sum()))
    slot = np.arange(len(own)) - np.repeat(np.cumsum(count) - count, count)
    devices[np.repeat(np.arange(n), count), slot] = own
    hh_size = np.bincount(member_of[member_of >= 0], minlength=n_hh)
    shared_hh = (hh_size >= 2) & (rng.random(n_hh) < p.shared_device_share)
    tablet = np.full(n_hh, -1, dtype=np.int64)
    tablet[shared_hh] = world.new_devices(int(shared_hh.sum()))
    devices[:, 3] = np.where(member_of >= 0, tablet[np.maximum(member_of, 0)], -1)
    weights = np.where(devices >= 0, np.array([0.6, 0.25, 0.15, 0.3]), 0.0)
    cum = np.cumsum(weights, axis=1) / weights.sum(axis=1, keepdims=True)
    return devices, cum


def _campus_mail(world: World, emails: list[str], campus: np.ndarray) -> list[str]:
    """Half the campus accounts use the university's own mail domain."""
    domain = world.domains.new_small_domains(1)[0]
    pick = np.flatnonzero(campus & (world.rng.random(len(emails)) < 0.5))
    fresh = world.mail.addresses([domain] * len(pick))
    out = list(emails)
    for i, address in zip(pick.tolist(), fresh, strict=True):
        out[i] = address
    return out


def _typos(rng: np.random.Generator, phones: list[str | None], share: float) -> list[str | None]:
    """A few users drop a digit when typing their number: it still parses, but is invalid."""
    out = list(phones)
    for i in np.flatnonzero(rng.random(len(out)) < share).tolist():
        num = out[i]
        if num is not None and len(num) > 9:
            cut = int(rng.integers(5, len(num)))
            out[i] = num[:cut] + num[cut + 1 :]
    return out


def _register(
    world: World, p: ScenarioParams, campus: np.ndarray, region: np.ndarray, isp: np.ndarray
) -> np.ndarray:
    """Identities for the benign accounts (campus ones partly on the university's domain)."""
    isp = np.where(campus, world.rng.integers(0, len(world.nets.isp_v4), len(campus)), isp)
    emails, phones = world.identities(region, isp, p.no_phone_share)
    emails = _campus_mail(world, emails, campus)
    phones = _typos(world.rng, phones, p.phone_typo_share)
    return world.add_accounts(emails, phones)


def build_population(world: World, p: ScenarioParams) -> tuple[Population, Households]:
    rng, clock, counts = world.rng, world.clock, plan_counts(p)
    group = np.repeat(np.arange(len(GROUPS)), [counts[g] for g in GROUPS])
    n = len(group)
    campus = group >= _G["campus_established"]
    member_of = np.full(n, -1, dtype=np.int64)
    idx, hh = _households(world, p, int((~campus).sum()))
    member_of[~campus] = idx
    region = np.where(campus, 0, hh.region[np.maximum(member_of, 0)])
    account = _register(world, p, campus, region, hh.isp[np.maximum(member_of, 0)])
    devices, cum = _devices(world, p, member_of, len(hh.isp), n)
    est = np.isin(group, [_G["established"], _G["campus_established"]])
    change = est & (rng.random(n) < p.device_change_share)
    new_phone = np.full(n, -1, dtype=np.int64)
    new_phone[change] = world.new_devices(int(change.sum()))
    rate = _rates(rng, p, est)
    vpn = rng.random(n) < p.vpn_user_share
    mobile = np.clip(rng.beta(2.0, 3.0, n) * p.mobile_share / 0.4, 0.0, 1.0)
    mobile = np.where(rng.random(n) < 0.08, 1.0, mobile)  # mobile-only households
    pop = Population(
        account=account, group=group, region=region, household=member_of,
        created_ms=_created(world, p, group, region), rate=rate,
        p_mobile=np.where(campus, 0.3, mobile), p_vpn=np.where(vpn, 0.5, 0.0),
        carrier=rng.choice(4, size=n, p=[0.35, 0.3, 0.2, 0.15]), devices=devices,
        dev_weights=cum,
        change_ms=np.where(change, rng.integers(clock.start_ms, clock.end_ms, n), _NEVER),
        new_phone=new_phone,
    )  # fmt: skip
    return pop, hh
