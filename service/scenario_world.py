"""The shared registries of one generated world: accounts, devices, networks, mail and phones.

Benign users and attackers draw identifiers from the same generators here, so that the spelling
of an identifier never tells which side it belongs to.
"""

from __future__ import annotations

import numpy as np

from service.scenario_events import Addresses
from service.scenario_mail import DomainBook, MailBook
from service.scenario_net import Networks, hosts_in_16, hosts_in_24, mix64
from service.scenario_phone import COUNTRIES, PhoneBook
from service.scenario_time import Clock


class World:
    """Registries and generators for one scenario; every random draw goes through `rng`."""

    def __init__(
        self,
        rng: np.random.Generator,
        clock: Clock,
        scale: float,
        plus_tag_share: float,
        capital_email_share: float,
        landline_share: float,
    ) -> None:
        self.rng = rng
        self.clock = clock
        self.scale = scale
        self.salt = int(rng.integers(1, 2**62))
        self.nets = Networks.build(rng, scale)
        self.domains = DomainBook(rng, len(self.nets.isp_v4), scale)
        self.mail = MailBook(rng, plus_tag_share, capital_email_share)
        self.phones = PhoneBook(rng, landline_share)
        # Throwaway domains seen in past incidents (the rules in force deny them).
        self.incident_domains = self.domains.new_small_domains(4)
        self.emails: list[str] = []
        self.phone_of: list[str | None] = []
        self.n_devices = 0

    def add_accounts(self, emails: list[str], phones: list[str | None]) -> np.ndarray:
        """Register accounts; returns their global indices."""
        first = len(self.emails)
        self.emails.extend(emails)
        self.phone_of.extend(phones)
        return np.arange(first, len(self.emails), dtype=np.int64)

    def new_devices(self, n: int) -> np.ndarray:
        first = self.n_devices
        self.n_devices += n
        return np.arange(first, self.n_devices, dtype=np.int64)

    def phones_for(self, region: np.ndarray, no_phone_share: float) -> list[str | None]:
        """One number per user of `region` (indices into COUNTRIES), None for a share."""
        out = np.empty(len(region), dtype=object)
        has = self.rng.random(len(region)) >= no_phone_share
        for r, (code, _, _) in enumerate(COUNTRIES):
            sel = has & (region == r)
            if sel.any():
                out[sel] = np.array(self.phones.draw(code, int(sel.sum())), dtype=object)
        return list(out)

    def identities(
        self, region: np.ndarray, isp: np.ndarray, no_phone_share: float
    ) -> tuple[list[str], list[str | None]]:
        """E-mail addresses and phones drawn as for any user of the marketplace."""
        emails = self.mail.addresses(self.domains.draw(isp))
        return emails, self.phones_for(region, no_phone_share)

    def draw(self, n: int) -> np.ndarray:
        """`n` random 62-bit integers (for picking hosts, interface ids, ...)."""
        return self.rng.integers(0, 2**62, size=n, dtype=np.int64).astype(np.uint64)

    def hash(self, *keys: np.ndarray) -> np.ndarray:
        """A stable pseudo-random 64-bit value per row of `keys`, salted per world."""
        h = np.full(len(keys[0]), self.salt, dtype=np.uint64)
        for k in keys:
            h = mix64(h ^ np.asarray(k).astype(np.uint64))
        return h

    def residential(self, n: int) -> Addresses:
        """Random IPv4 addresses anywhere in the ISPs' space (what residential proxies use)."""
        isp = self.rng.integers(0, len(self.nets.isp_v4), n)
        out = np.zeros(n, dtype=np.uint64)
        draw = self.draw(n)
        for k, blocks in enumerate(self.nets.isp_v4):
            sel = isp == k
            out[sel] = hosts_in_16(blocks, draw[sel])
        return Addresses.v4(out)

    def carrier_address(self, carrier: np.ndarray) -> Addresses:
        """A fresh address from each user's carrier pool (carriers re-assign them often)."""
        out = np.zeros(len(carrier), dtype=np.uint64)
        draw = self.draw(len(carrier))
        for k, pool in enumerate(self.nets.carrier_pools):
            sel = carrier == k
            out[sel] = hosts_in_24(pool, draw[sel])
        return Addresses.v4(out)

    def hosting_hosts(self, network: int, n: int) -> np.ndarray:
        """`n` distinct host addresses inside hosting network `network`."""
        picks = self.rng.choice(254, size=min(n, 254), replace=False)
        return hosts_in_24(self.nets.hosting[[network]], picks)
