"""The invented world behind the demo data: the Orrivask Cooperative.

Everything here is fictional. Names are built from invented syllables; machines live under the
reserved top-level domains .example, .test and .invalid (RFC 2606, RFC 6761); addresses come from the
documentation ranges (RFC 5737 for IPv4, RFC 3849 for IPv6) and the private ranges (RFC 1918).

Staff, their accounts and the machines are split into disjoint train / dev / test pools so that a model
is tested on names it never saw. Services, sites, partners, paths and error codes are shared: they are
the cooperative's fixed vocabulary. Some machines are named after staff given names ('orla' the host,
'Orla' the person) and some services after sites ('ombrevale' the service, 'Ombrevale' the site), so
that only the context tells which is which.
"""

from __future__ import annotations

import ipaddress
import random
import unicodedata
from dataclasses import dataclass
from typing import NamedTuple


class EntityType(NamedTuple):
    name: str
    description: str
    example: str


ENTITY_TYPES: tuple[EntityType, ...] = (
    EntityType("host", "a machine, by short name or FQDN (also the whole host:port token)",
               "kvask-db03.ops.orrivask.example"),
    EntityType("netaddr", "an IPv4 or IPv6 address, address:port or CIDR block", "198.51.100.23:8443"),
    EntityType("account", "a login name, service account or e-mail address", "orla.quelith"),
    EntityType("service", "a program or service of the cooperative", "vaskmux"),
    EntityType("filepath", "a file or directory path (POSIX or drive-letter)", "/srv/vaskmux/spool/queue.db"),
    EntityType("errcode", "an error code: house codes, errno names, hex status words", "OVK-4012"),
    EntityType("person", "a member of staff or a partner's contact, full or given name", "Orla Quelith"),
    EntityType("place", "a site, office or town", "Ombrevale"),
    EntityType("org", "an organisation: the cooperative itself or one of its partners", "Zaffrin Ledgerworks"),
)
LABELS: tuple[str, ...] = tuple(entity.name for entity in ENTITY_TYPES)

ORG_NAME = "Orrivask Cooperative"
SPLITS: tuple[str, ...] = ("train", "dev", "test")

# The world is fixed: it does not depend on the generator's seed, so the README can describe it and the
# train/test name pools stay disjoint whatever seed is used.
_WORLD_SEED = "orrivask-world-1"
_SPLIT_SHARES = (0.6, 0.2, 0.2)

# --- names built from syllables ----------------------------------------------------------------------
_GIVEN_HEADS = ("Or", "Ma", "Te", "Ila", "Bre", "Ky", "Sa", "Do", "Fe", "Lu", "Ne", "Ri", "Va", "Ze", "Ha",
                "Jo", "Wy", "Ca", "Pe", "Ysa", "Ta", "Mi", "Ele", "Qui", "Ro", "Sen", "Uma", "Bal", "Dre", "Ivo")
_GIVEN_TAILS = ("la", "ren", "vik", "sel", "mir", "dan", "wyn", "tha", "rio", "bel", "nis", "quin", "dra",
                "lo", "vel", "ssa", "ko", "ther", "ril", "mae")
# Combinations that happen to be well-known fictional characters, brands or public figures, or words
# that must not turn up as a name or, lower-cased, as a host named after someone.
_NAME_DENYLIST = ("Kylo", "Mario", "Halo", "Lula", "Tesla", "Carlo", "Nessa", "Rolo", "Tanis", "Mila", "Nether",
                  "Penis", "Tether", "Peril", "Salo", "Malo", "Luther", "Mather")

_FAMILY_HEADS = ("Vor", "Quel", "Dask", "Ambr", "Thren", "Ossil", "Mirr", "Kest", "Yvar", "Brenn", "Zoll",
                 "Ulth", "Pask", "Dree", "Orv", "Feln", "Gask", "Holl", "Imber", "Trask")
_FAMILY_TAILS = ("ane", "ick", "owe", "ith", "essa", "umb", "arrow", "enby", "ault", "isk", "el", "ory",
                 "wyn", "ade", "ühl", "éry")

# Host stems use onsets that rarely begin a word or a brand, so they read as clearly invented.
_STEM_ONSETS = ("kv", "zv", "vr", "dz", "thw", "gw", "pf", "tl", "hv", "khr")
_STEM_VOWELS = ("a", "e", "i", "o", "u", "y")
_STEM_CODAS = ("sk", "rn", "ld", "mb", "x", "lt", "nd", "rv")
HOST_ROLES: tuple[str, ...] = ("db", "web", "mq", "gw", "fs", "ci", "kv", "log", "bk", "edge", "app", "lb")

# --- the shared vocabulary -----------------------------------------------------------------------------
PLACES: tuple[str, ...] = (
    "Quelvarro", "Ombrevale", "Kirrawend", "Pennavask", "Yseldrin", "Torvanick", "Glasquel", "Urrendask",
    "Vostremay", "Ithenholt", "Brask Hollow", "Nethermoss Quay", "Calvorin", "Drummaquil", "Essenwyrd",
    "Low Tarrowick",
)
# Services named after sites: the same word is a service in a log header and a place in a chat message.
PLACE_NAMED_SERVICES: tuple[str, ...] = ("ombrevale", "kirrawend", "yseldrin", "glasquel", "calvorin")
SERVICES: tuple[str, ...] = (
    "vaskmux", "tarnwatch", "brelliq", "orrisync", "quorvel-api", "zemtrack", "ulvadesk", "hessipost",
    "grimmet-queue", "ovk-billing", "nusk-auth", "plendr", "weftcache", "kobbit-ingest", "drellmail",
    "snorra-dns", "ledgerkeep", "thimblevault",
) + PLACE_NAMED_SERVICES
PARTNERS: tuple[str, ...] = (
    "Quorrin Haulage Guild", "Ostrevel Mutual", "Brannoch & Vide Freight", "Teskaloo Systems Cooperative",
    "Vimmerdal Assurance", "Zaffrin Ledgerworks", "Hollucast Parcel Union", "Imbrell Metrics",
    "Duvessa Print Collective", "Karrowsty Energy Trust",
)
ORGS: tuple[str, ...] = (ORG_NAME,) + PARTNERS
ORG_SHORT_NAMES: tuple[str, ...] = ("Orrivask", "Quorrin", "Ostrevel", "Teskaloo", "Vimmerdal", "Zaffrin",
                                    "Hollucast", "Imbrell", "Duvessa", "Karrowsty")
ORG_DOMAIN = "orrivask.example"
LAB_DOMAIN = "orrivask.test"
LEGACY_DOMAIN = "legacy.orrivask.invalid"
DOMAINS: tuple[str, ...] = (ORG_DOMAIN, LAB_DOMAIN, LEGACY_DOMAIN)
PARTNER_DOMAINS: tuple[str, ...] = ("quorrin-haulage.example", "ostrevel.example", "zaffrin.test",
                                    "imbrell-metrics.example", "duvessa.example")
ZONES: tuple[str, ...] = ("ops", "lab", "dmz", "stor", "qvr", "omb", "kir")
GENERIC_ACCOUNTS: tuple[str, ...] = ("root", "deploy", "backup", "admin", "ci-runner", "nobody", "sync")
# House error codes, errno names (POSIX) and hex status words.
ERROR_PREFIXES: tuple[str, ...] = ("OVK", "VMX", "TWT", "BRQ", "LDK", "HSP")
ERROR_WORDS: tuple[str, ...] = ("QUOTA_SPENT", "LEDGER_LOCKED", "PEER_GONE", "SEAL_BROKEN", "TOKEN_STALE",
                                "SHARD_MISSING", "CLOCK_SKEW", "MANIFEST_TORN")
ERRNO_NAMES: tuple[str, ...] = ("ECONNREFUSED", "ETIMEDOUT", "ENOSPC", "EACCES", "ENOENT", "EHOSTUNREACH",
                                "ECONNRESET", "EPERM", "EIO", "EMFILE")
FILE_NAMES: tuple[str, ...] = ("ledger.db", "queue.db", "notes.txt", "invoices.csv", "roster.xlsx",
                               "report.pdf", "keys.pem", "settings.toml", "export.json", "dump.sql",
                               "manifest.yaml", "tally.ods")

# Address ranges the demo may use: documentation (RFC 5737, RFC 3849) and private (RFC 1918).
IPV4_NETWORKS: tuple[ipaddress.IPv4Network, ...] = tuple(ipaddress.IPv4Network(n) for n in (
    "192.0.2.0/24", "198.51.100.0/24", "203.0.113.0/24", "10.0.0.0/8", "172.16.0.0/12", "192.168.0.0/16"))
IPV6_NETWORKS: tuple[ipaddress.IPv6Network, ...] = (ipaddress.IPv6Network("2001:db8::/32"),)


def ascii_fold(text: str) -> str:
    """Drop accents so a name can become a login or host name ('Quelühl' -> 'Queluhl')."""
    decomposed = unicodedata.normalize("NFKD", text)
    return "".join(ch for ch in decomposed if not unicodedata.combining(ch))


def slug(text: str) -> str:
    """Lower-case, ASCII, spaces to hyphens: for paths and host names made from names."""
    return ascii_fold(text).lower().replace(" ", "-").replace("&", "and")


@dataclass(frozen=True)
class SplitPool:
    """The names one split may draw from. Pools of different splits share no element."""

    split: str
    given_names: tuple[str, ...]
    family_names: tuple[str, ...]
    people: tuple[tuple[str, str], ...]      # (given, family)
    namesake_hosts: tuple[str, ...]          # hosts named after this split's staff given names
    host_stems: tuple[str, ...]


def _partition(items: list[str], salt: str) -> dict[str, tuple[str, ...]]:
    """Shuffle a de-duplicated, sorted list with a fixed seed and cut it into train/dev/test parts."""
    unique = sorted(dict.fromkeys(items))     # sorted: never depends on hash order
    random.Random(f"{_WORLD_SEED}/{salt}").shuffle(unique)
    first = int(len(unique) * _SPLIT_SHARES[0])
    second = first + int(len(unique) * _SPLIT_SHARES[1])
    return {"train": tuple(unique[:first]), "dev": tuple(unique[first:second]), "test": tuple(unique[second:])}


def _given_names() -> list[str]:
    reserved = {name.lower() for name in SERVICES} | {slug(place) for place in PLACES}
    names = [head + tail for head in _GIVEN_HEADS for tail in _GIVEN_TAILS]
    return [name for name in names if name not in _NAME_DENYLIST and name.lower() not in reserved]


def _family_names() -> list[str]:
    return [head + tail for head in _FAMILY_HEADS for tail in _FAMILY_TAILS]


def _host_stems() -> list[str]:
    return [onset + vowel + coda for onset in _STEM_ONSETS for vowel in _STEM_VOWELS for coda in _STEM_CODAS]


def _build_pools() -> dict[str, SplitPool]:
    given = _partition(_given_names(), "given")
    family = _partition(_family_names(), "family")
    stems = _partition(_host_stems(), "stems")
    pools = {}
    for split in SPLITS:
        rng = random.Random(f"{_WORLD_SEED}/people/{split}")
        staff_size = len(given[split]) * 3 // 2
        people = tuple(dict.fromkeys(
            (rng.choice(given[split]), rng.choice(family[split])) for _ in range(staff_size)))
        ascii_given = sorted(dict.fromkeys(g for g, _ in people if ascii_fold(g) == g))
        namesakes = tuple(name.lower() for name in rng.sample(ascii_given, max(8, len(ascii_given) // 4)))
        pools[split] = SplitPool(split, given[split], family[split], people, namesakes, stems[split])
    return pools


POOLS: dict[str, SplitPool] = _build_pools()


def account_name(given: str, family: str, style: int) -> str:
    """A login for a person; `style` picks one of the house conventions."""
    g, f = ascii_fold(given).lower(), ascii_fold(family).lower()
    conventions = (f"{g}.{f}", f"{g[0]}{f}", f"{f}{g[0]}", f"{g}_{f[:3]}")
    return conventions[style % len(conventions)]
