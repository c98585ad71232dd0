"""Deterministic generator of labelled demo lines (train/dev/test) and an unlabelled demo stream.

A line is composed from a *header* (syslog RFC 5424 or BSD style, application log, JSON object,
key=value, chat, support ticket, monitoring alert, audit, web access) and a *message template*;
slots in both are filled from the invented world in `scenario`. Every (family, header, template)
triple is one line shape; `shape_count()` says how many there are.

Held-out shapes. Without them train and test share every line shape and the test split measures
little more than memorised templates. So a fixed part of the templates is held out of train: 33
message templates (13 system, 8 chat, 4 ticket, 3 alert, 3 audit, 2 web) and 4 header variants
(key=value, chat, alert, web). A shape is held out when its header or its message is; that is 400 of
1462 shapes (27%, `held_out_shapes()`). Train uses shared shapes only; dev and test draw a third of
their lines from held-out shapes (HELD_OUT_LINE_SHARE) and the rest from the shared ones. The
held-out templates are ordinary lines of the same world, but put names where the shared ones do not:
lower-cased person names, a site-named service capitalised at the start of a sentence, a site typed
in lower case, partners' short names in chat, and entities of one type side by side with nothing
between them ("sites affected: Ombrevale Brask Hollow"), which BIO must tag B-X I-X B-X. Dev and test
also carry more noise (NOISE_SHARE: typos, odd casing, extra spaces, truncation).

Spans are recorded while the string is composed, never found afterwards. Entity boundaries sit on
token boundaries both of `streamtag.tokenize` and of a plain log tokenizer (split on white space,
brackets, quotes, commas and '='; trailing '.', ',', ':', ';', '!' or '?' cut off): an address:port or
a host:port is one span; URLs and request paths are left unlabelled; a name followed by ':' or '.' is
labelled without it; no name is glued to a possessive "'s".

Determinism: only `random.Random` instances seeded from (split, seed) are used, and nothing iterates a
set or relies on string hashing, so PYTHONHASHSEED does not change the output.
"""

from __future__ import annotations

import argparse
import ipaddress
import json
import re
import sys
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from random import Random
from typing import Callable

import orjson

from streamtag.checkpoint import write_file_atomically
from streamtag.corpus import write_jsonl
from streamtag.demo import scenario as world
from streamtag.errors import StreamtagError

Piece = tuple[str, str | None]          # (text, label or None)


# ============================================================================ slot fillers ==========

@dataclass
class _Context:
    """What a filler may use: the random source, the split's name pool, and a clock."""

    rng: Random
    pool: world.SplitPool
    when: datetime


def _person(ctx: _Context) -> tuple[str, str]:
    return ctx.rng.choice(ctx.pool.people)


def _short_host(ctx: _Context) -> str:
    rng = ctx.rng
    if rng.random() < 0.35:
        return rng.choice(ctx.pool.namesake_hosts)
    stem, role, number = rng.choice(ctx.pool.host_stems), rng.choice(world.HOST_ROLES), rng.randint(1, 24)
    form = rng.randrange(3)
    if form == 0:
        return f"{stem}-{role}{number:02d}"
    if form == 1:
        return f"{role}-{stem}-{number}"
    return f"{stem}{number}"


def _fqdn(ctx: _Context) -> str:
    zone = ctx.rng.choice(world.ZONES)
    domain = ctx.rng.choices(world.DOMAINS, weights=(6, 3, 1))[0]
    return f"{_short_host(ctx)}.{zone}.{domain}"


def _any_host(ctx: _Context) -> str:
    return _fqdn(ctx) if ctx.rng.random() < 0.4 else _short_host(ctx)


def _ipv4(ctx: _Context) -> str:
    rng = ctx.rng
    # Documentation ranges twice as often as private ones: they read as "somewhere else".
    network = rng.choices(world.IPV4_NETWORKS, weights=(2, 2, 2, 1, 1, 1))[0]
    offset = rng.randrange(1, min(network.num_addresses - 1, 1 << 16))
    return str(network.network_address + offset)


def _ipv6(ctx: _Context) -> str:
    rng = ctx.rng
    base = int(world.IPV6_NETWORKS[0].network_address)
    # A few random groups, last one never zero so the text never ends in '::'.
    low = (rng.randrange(0, 1 << 16) << 64) | (rng.randrange(0, 1 << 32) << 16) | rng.randrange(1, 1 << 16)
    if rng.random() < 0.5:
        low = rng.randrange(1, 1 << 16)
    return str(ipaddress.IPv6Address(base | (rng.randrange(0, 1 << 16) << 80) | low))


def _port(ctx: _Context) -> str:
    return str(ctx.rng.choice((22, 53, 80, 443, 5432, 6379, 8080, 8443, 9000, 9443, ctx.rng.randint(1024, 65535))))


def _cidr(ctx: _Context) -> str:
    rng = ctx.rng
    network = rng.choice(world.IPV4_NETWORKS)
    prefix = rng.randint(max(network.prefixlen, 16), 28)
    subnets = 1 << (prefix - network.prefixlen)
    index = rng.randrange(min(subnets, 4096))
    return str(ipaddress.IPv4Network((int(network.network_address) + (index << (32 - prefix)), prefix)))


def _service(ctx: _Context) -> str:
    return ctx.rng.choice(world.SERVICES)


def _account(ctx: _Context) -> str:
    rng = ctx.rng
    draw = rng.random()
    if draw < 0.72:
        given, family = _person(ctx)
        return world.account_name(given, family, rng.randrange(4))
    if draw < 0.88:
        return "svc-" + rng.choice(world.SERVICES)
    return rng.choice(world.GENERIC_ACCOUNTS)


def _email(ctx: _Context) -> str:
    given, family = _person(ctx)
    local = world.account_name(given, family, 0)
    domain = world.ORG_DOMAIN if ctx.rng.random() < 0.75 else ctx.rng.choice(world.PARTNER_DOMAINS)
    return f"{local}@{domain}"


def _path(ctx: _Context) -> str:
    rng = ctx.rng
    service, file_name = rng.choice(world.SERVICES), rng.choice(world.FILE_NAMES)
    place = world.slug(rng.choice(world.PLACES))
    given, family = _person(ctx)
    account = world.account_name(given, family, rng.randrange(4))
    shapes = (
        f"/var/log/{service}/{service}.log",
        f"/srv/{service}/data/{file_name}",
        f"/etc/{service}/{service}.toml",
        f"/home/{account}/{file_name}",
        f"/opt/orrivask/bin/{service}",
        f"/mnt/archive/{place}/{rng.randint(2023, 2026)}-{rng.randint(1, 12):02d}.tar.zst",
        f"/var/spool/{service}/{rng.getrandbits(32):08x}.msg",
        f"/srv/shares/{place}/invoices/{file_name}",
        f"./conf/{service}.toml",
        f"D:\\Shares\\{place}\\{file_name}",
    )
    return rng.choice(shapes)


def _errcode(ctx: _Context) -> str:
    rng = ctx.rng
    scheme = rng.randrange(5)
    if scheme == 0:
        return f"{rng.choice(world.ERROR_PREFIXES)}-{rng.randint(100, 9999)}"
    if scheme == 1:
        return f"E{rng.randint(1000, 9999)}"
    if scheme == 2:
        return "ERR_" + rng.choice(world.ERROR_WORDS)
    if scheme == 3:
        return rng.choice(world.ERRNO_NAMES)
    return f"0x{rng.getrandbits(32):08X}"


def _full_name(ctx: _Context) -> str:
    given, family = _person(ctx)
    if ctx.rng.random() < 0.08:
        return f"{given} {ctx.rng.choice('ABDEFHJKLMNRSTV')}. {family}"
    return f"{given} {family}"


def _place(ctx: _Context) -> str:
    return ctx.rng.choice(world.PLACES)


def _org(ctx: _Context) -> str:
    rng = ctx.rng
    return rng.choice(world.ORG_SHORT_NAMES) if rng.random() < 0.2 else rng.choice(world.ORGS)


def _timestamp(ctx: _Context) -> datetime:
    return ctx.when + timedelta(seconds=ctx.rng.randrange(0, 86_400), microseconds=ctx.rng.randrange(1_000_000))


def _iso(ctx: _Context) -> str:
    stamp = _timestamp(ctx)
    if ctx.rng.random() < 0.5:
        return stamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{stamp.microsecond // 1000:03d}Z"
    offset = ctx.rng.choice(("+00:00", "+01:00", "-05:00", "+05:30"))
    return stamp.strftime("%Y-%m-%dT%H:%M:%S") + offset


def _iso5424(ctx: _Context) -> str:
    """RFC 5424 section 6.2.3 TIMESTAMP: full-date T full-time, fraction of 1..6 digits, Z or offset."""
    stamp = _timestamp(ctx)
    fraction = ctx.rng.choice(("", f".{stamp.microsecond // 1000:03d}", f".{stamp.microsecond:06d}"))
    zone = ctx.rng.choice(("Z", "Z", "+02:00", "-07:00"))
    return stamp.strftime("%Y-%m-%dT%H:%M:%S") + fraction + zone


def _bsd_time(ctx: _Context) -> str:
    """RFC 3164 section 4.1.2 TIMESTAMP: 'Mmm dd hh:mm:ss', day padded with a space."""
    stamp = _timestamp(ctx)
    return f"{stamp.strftime('%b')} {stamp.day:2d} {stamp.strftime('%H:%M:%S')}"


def _clf_time(ctx: _Context) -> str:
    return _timestamp(ctx).strftime("%d/%b/%Y:%H:%M:%S +0000")


def _structured_data(ctx: _Context) -> list[Piece]:
    """RFC 5424 section 6.3 STRUCTURED-DATA: NILVALUE or SD-ELEMENTs ('origin' is IANA-registered;
    32473 is the private enterprise number reserved for documentation, RFC 5612)."""
    draw = ctx.rng.random()
    pieces: list[Piece] = []
    if draw < 0.5:
        return [("-", None)]
    if draw < 0.8:
        pieces += [('[origin ip="', None), (_ipv4(ctx), "netaddr"), ('"]', None)]
    if draw >= 0.7:
        pieces += [('[ovk@32473 site="', None), (_place(ctx), "place"), ('" seq="', None),
                   (str(ctx.rng.randint(1, 99999)), None), ('"]', None)]
    return pieces


def _syslog_hostname(ctx: _Context) -> Piece:
    draw = ctx.rng.random()
    if draw < 0.6:
        return _fqdn(ctx), "host"
    if draw < 0.85:
        return _short_host(ctx), "host"
    if draw < 0.95:
        return _ipv4(ctx), "netaddr"
    return "-", None


def _pick(*options: str) -> Callable[[_Context], str]:
    return lambda ctx: ctx.rng.choice(options)


def _number(low: int, high: int) -> Callable[[_Context], str]:
    return lambda ctx: str(ctx.rng.randint(low, high))


_LABELLED: dict[str, tuple[Callable[[_Context], str], str]] = {
    "host": (_short_host, "host"),
    "Host": (lambda ctx: ctx.rng.choice(ctx.pool.namesake_hosts).capitalize(), "host"),
    "nhost": (lambda ctx: ctx.rng.choice(ctx.pool.namesake_hosts), "host"),
    "fqdn": (_fqdn, "host"),
    "anyhost": (_any_host, "host"),
    "hostport": (lambda ctx: f"{_any_host(ctx)}:{_port(ctx)}", "host"),
    "ip": (_ipv4, "netaddr"),
    "ipport": (lambda ctx: f"{_ipv4(ctx)}:{_port(ctx)}", "netaddr"),
    "ip6": (_ipv6, "netaddr"),
    "cidr": (_cidr, "netaddr"),
    "account": (_account, "account"),
    "email": (_email, "account"),
    "service": (_service, "service"),
    "placeservice": (lambda ctx: ctx.rng.choice(world.PLACE_NAMED_SERVICES), "service"),
    "path": (_path, "filepath"),
    "errcode": (_errcode, "errcode"),
    "errno": (lambda ctx: ctx.rng.choice(world.ERRNO_NAMES), "errcode"),
    "person": (_full_name, "person"),
    "given": (lambda ctx: _person(ctx)[0], "person"),
    "given_lc": (lambda ctx: _person(ctx)[0].lower(), "person"),
    "place": (_place, "place"),
    "org": (_org, "org"),
    # The awkward cases the held-out shapes lean on: a site-named service written like a name at the
    # start of a sentence, a site typed in lower case (spelt like that service), a partner's short name.
    "Placeservice": (lambda ctx: ctx.rng.choice(world.PLACE_NAMED_SERVICES).capitalize(), "service"),
    "place_lc": (lambda ctx: ctx.rng.choice(world.PLACES).lower(), "place"),
    "orgshort": (lambda ctx: ctx.rng.choice(world.ORG_SHORT_NAMES), "org"),
    "person_lc": (lambda ctx: " ".join(_person(ctx)).lower(), "person"),
}

_UNLABELLED: dict[str, Callable[[_Context], str]] = {
    "port": _port,
    "pid": _number(2, 65535),
    "num": _number(1, 120),
    "big": _number(1000, 99999),
    "ms": _number(3, 30000),
    "pct": _number(51, 100),
    "size": lambda ctx: f"{ctx.rng.randint(1, 999)}.{ctx.rng.randint(0, 9)} {ctx.rng.choice(('KiB', 'MiB', 'GiB'))}",
    "bytes": _number(0, 5_000_000),
    "dur": lambda ctx: f"{ctx.rng.randint(0, 59)}m{ctx.rng.randint(0, 59):02d}s",
    "iso": _iso,
    "rfcts": _iso5424,
    "bsdts": _bsd_time,
    "clf": _clf_time,
    "date": lambda ctx: _timestamp(ctx).strftime("%Y-%m-%d"),
    "time": lambda ctx: _timestamp(ctx).strftime("%H:%M:%S"),
    "hhmm": lambda ctx: _timestamp(ctx).strftime("%H:%M"),
    "ms3": lambda ctx: f"{ctx.rng.randrange(1000):03d}",
    "epoch": lambda ctx: str(int(_timestamp(ctx).timestamp() * 1000)),
    "uuid": lambda ctx: "{:08x}-{:04x}-4{:03x}-a{:03x}-{:012x}".format(
        ctx.rng.getrandbits(32), ctx.rng.getrandbits(16), ctx.rng.getrandbits(12), ctx.rng.getrandbits(12),
        ctx.rng.getrandbits(48)),
    "ticket": lambda ctx: f"{ctx.rng.choice(('TCK', 'INC', 'CHG'))}-{ctx.rng.randint(1000, 99999)}",
    "version": lambda ctx: f"{ctx.rng.randint(0, 9)}.{ctx.rng.randint(0, 30)}.{ctx.rng.randint(0, 9)}",
    "word": _pick("retries", "colour", "max_lag", "shard_hint", "warmup", "fanout"),
    "group": _pick("ledger-readers", "ops", "finance", "night-shift", "depot-leads", "auditors"),
    "role": _pick("viewer", "operator", "approver", "owner"),
    "url": lambda ctx: ctx.rng.choice((
        f"https://portal.{world.ORG_DOMAIN}/tickets/{ctx.rng.randint(100, 9999)}",
        f"https://{ctx.rng.choice(world.PARTNER_DOMAINS)}/api/v1/feed",
        f"https://wiki.{world.LAB_DOMAIN}/runbooks/{ctx.rng.choice(world.SERVICES)}",
        f"http://status.{world.ORG_DOMAIN}/")),
    "level": _pick("debug", "info", "info", "warn", "error"),
    "LEVEL": _pick("DEBUG", "INFO", "INFO", "NOTICE", "WARN", "ERROR"),
    "L": _pick("D", "I", "I", "W", "E"),
    "module": _pick("core.sync", "io.spool", "auth.session", "net.peer", "jobs.runner", "db.pool"),
    "msgid": _pick("-", "AUTH", "SYNC", "ID47", "JOB", "NET"),
    "pri": lambda ctx: str(ctx.rng.randint(0, 23) * 8 + ctx.rng.randint(0, 7)),
    "status": _pick("200", "200", "201", "204", "301", "304", "400", "401", "403", "404", "500", "503"),
    "SEV": _pick("CRIT", "WARN", "PAGE", "INFO"),
    "state": _pick("FIRING", "RESOLVED", "OPEN", "CLEARED"),
    "check": _pick("disk", "http", "ping", "cert", "backup", "load", "queue"),
    "prio": _pick("P1", "P2", "P3", "P4"),
    "agent": _pick("vaskbrowse/4.2 (desk)", "quillfetch/1.9", "tarnprobe/0.7 (monitor)", "ledgerclient/12.1"),
    "file": lambda ctx: ctx.rng.choice(world.FILE_NAMES),
    "place_slug": lambda ctx: world.slug(_place(ctx)),
    "b64": lambda ctx: "".join(ctx.rng.choice("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/")
                               for _ in range(ctx.rng.randint(24, 64))) + "==",
}

_COMPOUND: dict[str, Callable[[_Context], list[Piece]]] = {
    "sd": _structured_data,
    "syshost": lambda ctx: [_syslog_hostname(ctx)],
    "bsdhost": lambda ctx: [(_ipv4(ctx), "netaddr")] if ctx.rng.random() < 0.2 else [(_short_host(ctx), "host")],
    "acct_or_dash": lambda ctx: [(_account(ctx), "account")] if ctx.rng.random() < 0.6 else [("-", None)],
    "referer": lambda ctx: [(_UNLABELLED["url"](ctx), None)] if ctx.rng.random() < 0.6 else [("-", None)],
}


def _fill(slot: str, ctx: _Context) -> list[Piece]:
    """Fill one slot. A trailing digit only makes a second, independent draw ('host2')."""
    name = slot if slot in _LABELLED or slot in _UNLABELLED or slot in _COMPOUND else slot.rstrip("0123456789")
    if name in _LABELLED:
        maker, label = _LABELLED[name]
        return [(maker(ctx), label)]
    if name in _UNLABELLED:
        return [(_UNLABELLED[name](ctx), None)]
    if name in _COMPOUND:
        return _COMPOUND[name](ctx)
    raise KeyError(f"unknown slot {{{slot}}}")


# ============================================================================ line shapes ===========

_SLOT_RE = re.compile(r"\{([A-Za-z_]+[0-9]*)\}")
MSG = "MSG"      # the slot in a header where the message template goes


def _compile(template: str) -> tuple[tuple[str, str], ...]:
    """Split a template into ('lit', text) and ('slot', name) parts."""
    parts, last = [], 0
    for match in _SLOT_RE.finditer(template):
        if match.start() > last:
            parts.append(("lit", template[last:match.start()]))
        parts.append(("slot", match.group(1)))
        last = match.end()
    if last < len(template):
        parts.append(("lit", template[last:]))
    return tuple(parts)


# Messages that a program writes: used under syslog, application, JSON and key=value headers.
# No double quotes inside: they sit inside msg="..." in key=value lines.
SYSTEM_MESSAGES: tuple[str, ...] = (
    "session opened for {account} from {ip} port {port}",
    "authentication refused for {account} from {ipport}: stale token",
    "{service} started on {host} (pid {pid}, version {version})",
    "{service} stopped after {dur}; exit status {num}",
    "cannot open {path}: {errno}",
    "write to {path} failed with {errcode}, retrying in {num}s",
    "upstream {ipport} timed out after {ms} ms, marking {anyhost} as down",
    "connection from {ip} rejected by rule {num}",
    "replica {host} lags primary {host2} by {num} s",
    "disk usage of {path} at {pct}% on {anyhost}",
    "job {uuid} for {account} finished in {dur}",
    "sync with {org} endpoint {url} failed: {errcode}",
    "on-call {person} acknowledged incident {ticket}",
    "site {place} uplink via {ip} restored",
    "certificate for {fqdn} expires in {num} days",
    "user {account} changed password",
    "user {account} added to group {group}",
    "config reload of {service} from {path} ok",
    "config {path} has unknown key '{word}', ignored",
    "lease {ip} given to {host} for {big}s",
    "address {ip6} assigned to {host}",
    "route to {cidr} via {ip} added",
    "{service} cannot reach {service2} at {hostport}: {errno}",
    "backup of {path} to {anyhost} done, {size} written",
    "backup of {path} failed: {errcode} (see {path2})",
    "quota for {account} exceeded on {path}",
    "token for {email} expired",
    "mail for {email} deferred: {errcode}",
    "request {uuid} from {ip} denied for {account}: {errcode}",
    "worker {num} of {service} crashed with {errcode}",
    "health check of {service} on {anyhost} returned {status}",
    "shipment feed from {org} delayed at the {place} depot",
    "temperature probe in {place} rack {num} reads {num2} C",
    "{person} ran a manual failover from {host} to {host2}",
    "scheduled maintenance at {place} by {org} starts at {hhmm}",
    "lookup of {fqdn} returned {ip}",
    "lookup of {fqdn} failed: {errcode}",
    "too many failed logins for {account} from {ip}, locked for {num} min",
    "{account} opened {path} read-only",
    "slow query on {host} ({ms} ms) by {account}",
    "cache {service} evicted {big} keys on {host}",
    "rotated {path} ({size})",
    "signing key for {account} added by {account2}",
    "firmware update on {host} in {place} failed with {errcode}",
    "invoice batch for {org} written to {path}",
    "mount of {path} on {anyhost} failed: {errno}",
    "peer {ip6} closed the session ({errcode})",
    "licence check against {org} server {fqdn} ok",
    "heartbeat ok, queue depth {num}",
    "flushed {big} records in {ms} ms",
)

# Held-out templates (see "Held-out shapes" below): never in train. They put names where the shared
# templates do not: at the start of a message, lower-cased, or side by side with no word between them.
SYSTEM_MESSAGES_HELD_OUT: tuple[str, ...] = (
    "{given_lc} restarted {service} on {nhost} outside the change window",
    "failover of {placeservice} from {place} to {place2} finished in {ms} ms",
    "{Placeservice} sync stalled on {host}, {num} batches waiting",
    "{errcode} while {service} read {path} for {org}",
    "on-call pair {person} {person2} paged for {errcode}",
    "sites affected: {place} {place2} {place3}",
    "drained {host} {host2} {host3} before moving {service}",
    "{nhost}: {service} lost its lease on {ip6}",
    "session for {account} opened from {place} via {ip}, owner {person_lc}",
    "retention removed {big} files under {path}, requested by {given}",
    "{service} {service2} restarted by {account} after {errcode}",
    "mirror {host} for {place} now pulls from {nhost}",
    "partner {orgshort} rotated the key used by {account}",
)

CHAT_MESSAGES: tuple[str, ...] = (
    "can someone look at {host}? it stopped answering after the {service} deploy",
    "{Host} is down again, I'm on it",
    "ask {given} about {path}, they wrote the importer",
    "{given_lc} is out at {place} today, ping {given2} for {service} issues",
    "thanks {given_lc}, {nhost} is back",
    "{person} from {org} will call about the {place} contract",
    "moving {path} to {host} tonight, shout if that breaks {service}",
    "who owns {account}? it keeps logging in to {host} at night",
    "restarted {service} on {host}, errors were {errcode}",
    "lunch in {place}? {given} is buying",
    "I get {errcode} when I open {url}",
    "{given} said {nhost} needs a new disk before friday",
    "pushed the fix, {given_lc} can you check {nhost} too?",
    "{org} changed their address to {ip}, please update the allowlist on {host}",
    "meeting with {person} and {person2} in {place} moved to {hhmm}",
    "is {ip} one of ours? saw it hammering {service}",
    "{given} and {nhost} are both in {place} now",
    "the {place} office lost power, {host} and {host2} went with it",
    "renamed {account} to {account2} as {given} asked in the ticket",
    "{given} has the keys to the {place} server room",
    "handing over to {given_lc}, {nhost} still flapping",
    "did anyone touch {path} on {host}?",
    "{service} on {nhost} says {errcode} again",
    "welcome {person}! joining from {place} to help with {service}",
    "{org} support says the outage is on their side",
    "can {given} get read access to {path}?",
    "{placeservice} is slow from {place} this morning",
    "ssh to {nhost} and tail {path}",
    "ping {given_lc} when {nhost} finishes the rebuild",
    "{Host} needs a reboot, {given} approved it",
    "{given_lc} fixed {placeservice} in {place}, thanks {given_lc2}",
    "anyone seen {given}? {nhost} is asking for a password",
)

CHAT_MESSAGES_HELD_OUT: tuple[str, ...] = (
    "{given_lc} {given_lc2} you around? {nhost} again",
    "{orgshort} folks say {placeservice} is fine on their side",
    "heading to {place_lc} tomorrow, {nhost} can wait",
    "talked to {person} {org} about the invoice, they blame {service}",
    "{Placeservice} is down in {place} since {hhmm}",
    "lol {nhost} ate {path} again",
    "{place} {place2} and {place3} are on the new {service} now",
    "cc {person} {person2}: {host} is yours this week",
)

TICKET_MESSAGES: tuple[str, ...] = (
    "I can't log in to {service} since this morning, it shows {errcode}.",
    "Please create an account for {person}, who starts in {place} on Monday.",
    "The printer share {path} on {host} is full again.",
    "Our partner {org} cannot reach {url} from {ip}.",
    "Please restore {path} from last night's backup.",
    "{Host} makes a loud noise in the {place} server room.",
    "Need access to {service} for {account} until end of month.",
    "Laptop {host} was lost on the train to {place}; please lock {account}.",
    "{person} left the team, please disable {account} and {email}.",
    "VPN from {place} drops every few minutes ({errcode}).",
    "Invoices from {org} land in {path} with wrong names.",
    "Since the update {service} shows error {errcode} on {host}.",
    "Please add {ip} to the allowlist for {service}.",
    "{given} from {org} needs a guest login at {place} on {date}.",
    "The {placeservice} dashboard is blank for everyone in {place}.",
    "Mail to {email} bounces with {errcode}.",
    "Please move {person} from the {place} group to {place2}.",
    "Could you rename host {host} to {host2}?",
)

TICKET_MESSAGES_HELD_OUT: tuple[str, ...] = (
    "Hi, this is {given_lc} from {place}: {service} says {errcode}.",
    "{person} {person2} and {person3} need access to {path}.",
    "{Placeservice} in {place} rejects {email} with {errcode}.",
    "Please ask the {org} {place} office to resend the file for {account}.",
)

ALERT_MESSAGES: tuple[str, ...] = (
    "disk {path} is {pct}% full",
    "{service} not responding on {hostport}",
    "{service} error rate {pct}% over {num} min",
    "packet loss {pct}% to {ip}",
    "certificate of {fqdn} expires in {num} days",
    "backup job for {host} missing since {date}",
    "login failures for {account} above {num}/min from {ip}",
    "link to {place} site down, last seen from {ip}",
    "{org} feed late by {num} min",
    "replication lag on {anyhost} is {num}s",
    "memory on {host} at {pct}%, top process {service}",
    "{errcode} count on {service} rose to {big}",
    "temperature in {place} room {num} C",
    "unknown address {ip6} on {host}",
    "on-call {person} has not acknowledged for {num} min",
)

ALERT_MESSAGES_HELD_OUT: tuple[str, ...] = (
    "{nhost} unreachable from {place} ({errcode})",
    "{placeservice} latency {ms} ms at {place}",
    "hosts down: {host} {host2} {host3}",
)

AUDIT_MESSAGES: tuple[str, ...] = (
    "op=login result=ok src={ip} host={host}",
    "op=login result=fail src={ipport} reason={errcode}",
    "op=read target={path} result=ok",
    "op=chmod target={path} mode=0600 by={account}",
    "op=elevate cmd={path} as=root",
    "op=grant role={role} to={account} site={place}",
    'op=export target={path} dest={fqdn} partner="{org}"',
    "op=delete target={path} result=denied code={errcode}",
    'op=key-add subject={account} approver="{person}"',
    "op=disable subject={account} ticket={ticket}",
    "op=service-restart svc={service} host={anyhost}",
    "op=net-change rule={num} cidr={cidr} via={ip}",
    'op=badge site="{place}" holder="{person}"',
)

AUDIT_MESSAGES_HELD_OUT: tuple[str, ...] = (
    'op=impersonate by="{person_lc}" as={account} host={nhost}',
    'op=share target={path} with="{person} {org}"',
    "op=site-move subject={account} from={place} to={place2}",
)

WEB_REQUESTS: tuple[str, ...] = (
    "GET /tickets/{num} HTTP/1.1",
    "POST /api/v2/login HTTP/1.1",
    "GET /static/{file} HTTP/2.0",
    "PUT /api/v2/users/{num}/prefs HTTP/1.1",
    "DELETE /api/v2/sessions/{uuid} HTTP/1.1",
    "GET /reports/{place_slug}/daily.csv HTTP/1.1",
    "HEAD / HTTP/1.1",
)

WEB_REQUESTS_HELD_OUT: tuple[str, ...] = (
    "PATCH /api/v2/tickets/{num} HTTP/1.1",
    "GET /healthz HTTP/1.1",
)

# Shapes the labelled splits never contain: only the doubtful part of the demo stream uses them.
NOVEL_MESSAGES: tuple[str, ...] = (
    "{date},{time},{host},{service},{account},{errcode}",
    '<evt t="{iso}" node="{host}" user="{account}" code="{errcode}"/>',
    "{given_lc} {nhost} {place} {placeservice}",
    "re: fwd: {person} // {host} // {org} // {place}",
    "  at {service}.Worker.run({path}:{num})",
    "{Host} {Host2} {given} ???",
    "{LEVEL}:{service}:{account}@{host}:{errcode}",
    "msg={b64} from {ip} ({given_lc})",
    "{place}/{placeservice}/{nhost} => {errcode} x{num}",
    "Fw: {org} meldet {host} ist weg, bitte {given} anrufen",
    "{nhost}|{given}|{place}|{org}",
    "{given_lc}@{nhost}:~$ cat {path}",
)


@dataclass(frozen=True)
class _Family:
    """A kind of line: its headers (with a {MSG} slot, or a JSON key layout) and message templates.

    `headers` and `messages` list the shared ones first, then the held-out ones; the first
    `shared_headers` headers and `shared_messages` messages are shared by all splits.
    """

    name: str
    headers: tuple
    messages: tuple[str, ...]
    weight: float
    shared_headers: int
    shared_messages: int
    is_json: bool = False
    truncatable: bool = True

    def is_held_out(self, header_index: int, message_index: int) -> bool:
        return header_index >= self.shared_headers or message_index >= self.shared_messages

    @property
    def n_held_out(self) -> int:
        return len(self.headers) * len(self.messages) - self.shared_headers * self.shared_messages


def _family(name: str, headers: tuple[tuple, tuple], messages: tuple[tuple, tuple], weight: float,
            **options) -> _Family:
    """A family from (shared, held-out) headers and (shared, held-out) messages."""
    return _Family(name, headers[0] + headers[1], messages[0] + messages[1], weight,
                   len(headers[0]), len(messages[0]), **options)


_SYSLOG_5424_HEADERS = (
    "<{pri}>1 {rfcts} {syshost} {service} {pid} {msgid} {sd} {MSG}",
    "<{pri}>1 {rfcts} {syshost} {service} - {msgid} - {MSG}",
    "<{pri}>1 {rfcts} {syshost} {service} {pid} - {sd} {MSG}",
)
_SYSLOG_BSD_HEADERS = (
    "<{pri}>{bsdts} {bsdhost} {service}[{pid}]: {MSG}",
    "{bsdts} {bsdhost} {service}[{pid}]: {MSG}",
    "{bsdts} {bsdhost} {service}: {MSG}",
)
_APP_HEADERS = (
    "{date} {time},{ms3} {LEVEL} [{service}] {MSG}",
    "{iso} {LEVEL} {service}: {MSG}",
    "{LEVEL} {iso} pid={pid} svc={service} {MSG}",
    "{time}.{ms3} {L} {module} - {MSG}",
)
# JSON layouts: (key, value template); a key starting with '#' holds a bare number.
_JSON_LAYOUTS = (
    (("ts", "{iso}"), ("level", "{level}"), ("service", "{service}"), ("host", "{host}"), ("msg", "{MSG}")),
    (("time", "{iso}"), ("severity", "{LEVEL}"), ("app", "{service}"), ("msg", "{MSG}"), ("src", "{ip}")),
    (("@t", "{iso}"), ("lvl", "{L}"), ("node", "{fqdn}"), ("site", "{place}"), ("message", "{MSG}"),
     ("trace", "{uuid}")),
    (("#timestamp", "{epoch}"), ("logger", "{module}"), ("user", "{account}"), ("message", "{MSG}"),
     ("#pid", "{pid}")),
)
_KV_HEADERS = (
    'ts={iso} level={level} svc={service} host={host} msg="{MSG}"',
    'time="{date} {time}" lvl={LEVEL} app={service} node={fqdn} msg="{MSG}" dur={ms}ms',
)
_CHAT_HEADERS = (
    "<{account}> {MSG}",
    "[{hhmm}] {person}: {MSG}",
    "{hhmm} <{person}> {MSG}",
)
_TICKET_HEADERS = (
    "{ticket} [{prio}] {person} <{email}>: {MSG}",
    "Ticket {ticket} opened by {person} ({place}): {MSG}",
    "[support] {account} wrote: {MSG}",
)
_ALERT_HEADERS = (
    "[{SEV}] {check} on {host}: {MSG}",
    "ALERT {iso} {SEV} {fqdn} {MSG}",
    "{state}: {MSG} (runbook {url})",
)
_AUDIT_HEADERS = (
    "audit {iso} actor={account} {MSG}",
    "AUDIT | {iso} | {anyhost} | {MSG}",
    "{iso} audit[{pid}]: who={account} {MSG}",
)
_WEB_HEADERS = (
    '{ip} - {acct_or_dash} [{clf}] "{MSG}" {status} {bytes}',
    '{ip} - {acct_or_dash} [{clf}] "{MSG}" {status} {bytes} "{referer}" "{agent}"',
    '{hostport} {ip} - - [{clf}] "{MSG}" {status} {bytes}',
    '{ip6} - {account} [{clf}] "{MSG}" {status} {bytes}',
)

# Held-out header variants: the same kinds of line with a field added or moved.
_KV_HEADERS_HELD_OUT = (
    'ts={iso} svc={service} who="{person_lc}" where={place_lc} msg="{MSG}"',
)
_CHAT_HEADERS_HELD_OUT = (
    "({hhmm}) {given}: {MSG}",
)
_ALERT_HEADERS_HELD_OUT = (
    "{SEV} [{place}] {host} {MSG}",
)
_WEB_HEADERS_HELD_OUT = (
    '{fqdn} {ip} - {acct_or_dash} [{clf}] "{MSG}" {status} {bytes}',
)

_SYSTEM = (SYSTEM_MESSAGES, SYSTEM_MESSAGES_HELD_OUT)
FAMILIES: tuple[_Family, ...] = (
    _family("syslog5424", (_SYSLOG_5424_HEADERS, ()), _SYSTEM, 0.12),
    _family("syslogbsd", (_SYSLOG_BSD_HEADERS, ()), _SYSTEM, 0.11),
    _family("app", (_APP_HEADERS, ()), _SYSTEM, 0.13),
    _family("json", (_JSON_LAYOUTS, ()), _SYSTEM, 0.11, is_json=True, truncatable=False),
    _family("kv", (_KV_HEADERS, _KV_HEADERS_HELD_OUT), _SYSTEM, 0.08),
    _family("chat", (_CHAT_HEADERS, _CHAT_HEADERS_HELD_OUT), (CHAT_MESSAGES, CHAT_MESSAGES_HELD_OUT), 0.14),
    _family("ticket", (_TICKET_HEADERS, ()), (TICKET_MESSAGES, TICKET_MESSAGES_HELD_OUT), 0.08),
    _family("alert", (_ALERT_HEADERS, _ALERT_HEADERS_HELD_OUT), (ALERT_MESSAGES, ALERT_MESSAGES_HELD_OUT), 0.09),
    _family("audit", (_AUDIT_HEADERS, ()), (AUDIT_MESSAGES, AUDIT_MESSAGES_HELD_OUT), 0.08),
    _family("web", (_WEB_HEADERS, _WEB_HEADERS_HELD_OUT), (WEB_REQUESTS, WEB_REQUESTS_HELD_OUT), 0.06),
)
_NOVEL = _family("novel", (("{MSG}",), ()), (NOVEL_MESSAGES, ()), 0.0)


def shape_count() -> int:
    """Number of distinct line shapes (family x header x message template) in the labelled splits."""
    return sum(len(family.headers) * len(family.messages) for family in FAMILIES)


def held_out_shapes() -> tuple[str, ...]:
    """Ids ("family/header/message") of the shapes train never contains; dev and test use them."""
    return tuple(f"{family.name}/{h}/{m}" for family in FAMILIES
                 for h in range(len(family.headers)) for m in range(len(family.messages))
                 if family.is_held_out(h, m))


def novel_shape_count() -> int:
    """Shapes used only by the doubtful part of the demo stream (never in train/dev/test)."""
    return len(_NOVEL.headers) * len(_NOVEL.messages)


# ============================================================================ composition ===========

@dataclass
class _Fragment:
    text: str
    label: str | None
    in_body: bool          # noise only ever touches the message body, never the header fields
    json_escaped: bool     # text goes inside a JSON string
    template_text: bool = False   # literal words of the template (not a filled-in value)


def _json_escape(text: str) -> str:
    return json.dumps(text, ensure_ascii=False)[1:-1]


def _template_fragments(template: str, ctx: _Context, in_body: bool, json_escaped: bool,
                        body: str | None = None) -> list[_Fragment]:
    fragments: list[_Fragment] = []
    for kind, value in _compile(template):
        if kind == "lit":
            fragments.append(_Fragment(value, None, in_body, json_escaped, template_text=True))
        elif value == MSG and body is not None:
            fragments += _template_fragments(body, ctx, True, json_escaped)
        else:
            fragments += [_Fragment(text, label, in_body, json_escaped) for text, label in _fill(value, ctx)]
    return fragments


def _json_fragments(layout: tuple, body: str, ctx: _Context) -> list[_Fragment]:
    fragments = [_Fragment("{", None, False, False)]
    for index, (key, value_template) in enumerate(layout):
        bare_number = key.startswith("#")
        key = key.lstrip("#")
        separator = ", " if index else ""
        if bare_number:
            fragments.append(_Fragment(f'{separator}"{key}": ', None, False, False))
            fragments += _template_fragments(value_template, ctx, False, False)
            continue
        fragments.append(_Fragment(f'{separator}"{key}": "', None, False, False))
        fragments += _template_fragments(value_template, ctx, False, True, body)
        fragments.append(_Fragment('"', None, False, False))
    fragments.append(_Fragment("}", None, False, False))
    return fragments


def _compose(family: _Family, header, body: str, ctx: _Context) -> list[_Fragment]:
    if family.is_json:
        return _json_fragments(header, body, ctx)
    return _template_fragments(header, ctx, False, False, body)


# ============================================================================ noise =================

_WORD_RE = re.compile(r"[A-Za-z]{4,}")
NOISE_KINDS: tuple[str, ...] = ("typo", "case", "space", "truncate")
_TYPO_LABELS = ("person", "host", "account", "service", "place", "org")


def _typo(word: str, rng: Random) -> str:
    """Swap, drop or double one inner letter: the slips people and broken tools make."""
    i = rng.randrange(1, len(word) - 2)
    op = rng.randrange(3)
    if op == 0:
        return word[:i] + word[i + 1] + word[i] + word[i + 2:]
    if op == 1:
        return word[:i] + word[i + 1:]
    return word[:i + 1] + word[i:]


def _add_typo(fragments: list[_Fragment], rng: Random) -> None:
    entity_ok = rng.random() < 0.3
    # Template words and names may be misspelt; filled-in values such as URLs or timestamps are not.
    candidates = [f for f in fragments if f.in_body and _WORD_RE.search(f.text)
                  and (f.template_text or (entity_ok and f.label in _TYPO_LABELS))]
    if not candidates:
        return
    fragment = rng.choice(candidates)
    # In a host or e-mail only the first label may change: the reserved domain must stay intact.
    editable = re.split(r"[.@]", fragment.text, maxsplit=1)[0] if fragment.label else fragment.text
    words = list(_WORD_RE.finditer(editable))
    if not words:
        return
    match = rng.choice(words)
    fragment.text = fragment.text[:match.start()] + _typo(match.group(), rng) + fragment.text[match.end():]


def _odd_case(fragments: list[_Fragment], rng: Random) -> None:
    change = rng.choice((str.upper, str.lower, str.upper))
    for fragment in fragments:
        if fragment.in_body:
            fragment.text = change(fragment.text)


def _extra_space(fragments: list[_Fragment], rng: Random) -> None:
    literals = [f for f in fragments if f.in_body and f.template_text and " " in f.text]
    widened = {rng.randrange(len(literals))} if literals else set()   # at least one gap grows
    for index, fragment in enumerate(literals):
        # Inside a JSON string a tab becomes the two characters backslash-t, glued to the next word.
        gaps = ("  ", "   ") if fragment.json_escaped else ("  ", "   ", "\t")
        pieces = fragment.text.split(" ")
        forced = rng.randrange(1, len(pieces)) if index in widened else -1
        fragment.text = pieces[0] + "".join(
            (rng.choice(gaps) if number == forced or rng.random() < 0.4 else " ") + piece
            for number, piece in enumerate(pieces[1:], start=1))
    if rng.random() < 0.5:
        fragments.append(_Fragment(" " * rng.randint(1, 3), None, False, False))


def _apply_noise(fragments: list[_Fragment], kinds: tuple[str, ...], rng: Random, typos: int = 1) -> None:
    if "typo" in kinds:
        for _ in range(typos):
            _add_typo(fragments, rng)
    if "case" in kinds:
        _odd_case(fragments, rng)
    if "space" in kinds:
        _extra_space(fragments, rng)


def _assemble(fragments: list[_Fragment]) -> tuple[str, list[tuple[int, int, str]], int]:
    """Join fragments, recording each entity's offsets as it is placed. Returns text, spans, body start."""
    parts: list[str] = []
    spans: list[tuple[int, int, str]] = []
    position, body_start = 0, -1
    for fragment in fragments:
        text = _json_escape(fragment.text) if fragment.json_escaped else fragment.text
        if fragment.in_body and body_start < 0:
            body_start = position
        if fragment.label is not None:
            spans.append((position, position + len(text), fragment.label))
        parts.append(text)
        position += len(text)
    return "".join(parts), spans, body_start


def _truncate(text: str, spans: list[tuple[int, int, str]], body_start: int, rng: Random):
    """Cut the line somewhere in its body but never inside an entity, as a full buffer or crash would."""
    if body_start < 0 or len(text) - body_start < 12:
        return text, spans
    inside = [False] * (len(text) + 1)
    for start, end, _ in spans:
        for i in range(start + 1, end):
            inside[i] = True
    cuts = [i for i in range(body_start + 6, len(text) - 3) if not inside[i]]
    if not cuts:
        return text, spans
    cut = rng.choice(cuts)
    kept = text[:cut].rstrip()
    return kept, [span for span in spans if span[1] <= len(kept)]


# ============================================================================ public API ============

_BASE_TIME = datetime(2025, 2, 3, tzinfo=timezone.utc)


@dataclass
class DetailedExample:
    """A labelled example plus how it was made (for tests and inspection)."""

    text: str
    spans: list[tuple[int, int, str]]
    shape: str                       # "family/header_index/message_index"
    noise: tuple[str, ...] = field(default_factory=tuple)

    def as_record(self) -> dict:
        return {"text": self.text, "spans": [{"start": s, "end": e, "label": lab} for s, e, lab in self.spans]}


def _check_split(split: str) -> None:
    if split not in world.SPLITS:
        raise StreamtagError(f"unknown split {split!r}; expected one of {', '.join(world.SPLITS)}")


def _check_count(n: int) -> None:
    if not isinstance(n, int) or n < 0:
        raise StreamtagError(f"number of lines must be a whole number >= 0, got {n!r}")


def _shared_shape(family: _Family, rng: Random) -> tuple[int, int]:
    return rng.randrange(family.shared_headers), rng.randrange(family.shared_messages)


def _held_out_shape(family: _Family, rng: Random) -> tuple[int, int]:
    """A shape with a held-out message (any header) or, less often, a held-out header (any message)."""
    has_messages = family.shared_messages < len(family.messages)
    has_headers = family.shared_headers < len(family.headers)
    if has_messages and (not has_headers or rng.random() < 0.65):
        return rng.randrange(len(family.headers)), rng.randrange(family.shared_messages, len(family.messages))
    return rng.randrange(family.shared_headers, len(family.headers)), rng.randrange(len(family.messages))


def _make_line(family: _Family, ctx: _Context, noise: tuple[str, ...], typos: int = 1,
               held_out: bool = False) -> DetailedExample:
    rng = ctx.rng
    header_index, message_index = (_held_out_shape if held_out else _shared_shape)(family, rng)
    fragments = _compose(family, family.headers[header_index], family.messages[message_index], ctx)
    _apply_noise(fragments, noise, rng, typos)
    text, spans, body_start = _assemble(fragments)
    if "truncate" in noise and family.truncatable:
        text, spans = _truncate(text, spans, body_start, rng)
    return DetailedExample(text, spans, f"{family.name}/{header_index}/{message_index}", noise)


def _choose_noise(rng: Random, share: float) -> tuple[str, ...]:
    if rng.random() >= share:
        return ()
    return (rng.choice(NOISE_KINDS),)


def _context(rng: Random, pool: world.SplitPool, index: int) -> _Context:
    # The clock advances with the line number so a file reads roughly in time order.
    return _Context(rng, pool, _BASE_TIME + timedelta(minutes=index))


# Share of each split's lines drawn from held-out shapes, and share of lines with noise. Dev matches
# test so that choosing a model on dev rewards the same generalisation the test split measures.
HELD_OUT_LINE_SHARE: dict[str, float] = {"train": 0.0, "dev": 1 / 3, "test": 1 / 3}
NOISE_SHARE: dict[str, float] = {"train": 0.15, "dev": 0.25, "test": 0.25}


def generate_split_detailed(split: str, n: int, seed: int, noise_share: float | None = None) -> list[DetailedExample]:
    """Like `generate_split`, but keeps the shape id and the noise applied to each line.

    `noise_share` None means the split's default (NOISE_SHARE)."""
    _check_split(split)
    _check_count(n)
    rng = Random(f"streamtag-demo/{split}/{seed}")
    pool = world.POOLS[split]
    weights = [family.weight for family in FAMILIES]
    held_out_share = HELD_OUT_LINE_SHARE[split]
    noise_share = NOISE_SHARE[split] if noise_share is None else noise_share
    examples = []
    for index in range(n):
        family = rng.choices(FAMILIES, weights=weights)[0]
        held_out = held_out_share > 0 and rng.random() < held_out_share
        examples.append(_make_line(family, _context(rng, pool, index), _choose_noise(rng, noise_share),
                                   held_out=held_out))
    return examples


def generate_split(split: str, n: int, seed: int) -> list[dict]:
    """`n` labelled examples {"text", "spans": [{"start", "end", "label"}]} for split train|dev|test."""
    return [example.as_record() for example in generate_split_detailed(split, n, seed)]


def generate_stream(n: int, seed: int, doubtful_share: float = 0.1) -> list[dict]:
    """`n` unlabelled lines {"text", "doubtful"} for the daemon demo.

    Exactly round(n * doubtful_share) lines are doubtful: unseen shapes (novel or held-out), heavy
    noise and ambiguous words, with names from the test pool. The others are ordinary lines of shared
    shapes with train-pool names.
    """
    _check_count(n)
    if not 0.0 <= doubtful_share <= 1.0:
        raise StreamtagError(f"doubtful share must lie in [0, 1], got {doubtful_share!r}")
    rng = Random(f"streamtag-demo/stream/{seed}")
    doubtful_positions = set(rng.sample(range(n), round(n * doubtful_share)))
    weights = [family.weight for family in FAMILIES]
    lines = []
    for index in range(n):
        doubtful = index in doubtful_positions
        if not doubtful:
            family = rng.choices(FAMILIES, weights=weights)[0]
            line = _make_line(family, _context(rng, world.POOLS["train"], index), _choose_noise(rng, 0.05))
        elif rng.random() < 0.55:
            line = _make_line(_NOVEL, _context(rng, world.POOLS["test"], index), _choose_noise(rng, 0.3))
        else:
            family = rng.choices(FAMILIES, weights=weights)[0]
            line = _make_line(family, _context(rng, world.POOLS["test"], index), NOISE_KINDS, typos=3,
                              held_out=rng.random() < 0.5)
        lines.append({"text": line.text, "doubtful": doubtful})
    return lines


def _jsonl(records: list[dict]) -> bytes:
    return b"".join(orjson.dumps(record) + b"\n" for record in records)


def write_demo_data(out_dir, seed: int = 7, n_train: int = 4000, n_dev: int = 500, n_test: int = 1000,
                    n_stream: int = 2000, doubtful_share: float = 0.1) -> dict:
    """Write train.jsonl, dev.jsonl, test.jsonl (labelled JSON Lines), stream.log (plain lines) and
    stream_truth.jsonl ({"line", "doubtful"} per stream line, 1-based). Returns {name: Path}."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True, mode=0o700)
        paths = {}
        for split, count in (("train", n_train), ("dev", n_dev), ("test", n_test)):
            paths[split] = out / f"{split}.jsonl"
            examples = generate_split_detailed(split, count, seed)
            write_jsonl(paths[split], ((example.text, example.spans, 1.0) for example in examples))
        stream = generate_stream(n_stream, seed, doubtful_share)
        paths["stream"] = out / "stream.log"
        write_file_atomically(paths["stream"], "".join(line["text"] + "\n" for line in stream).encode("utf-8"))
        paths["stream_truth"] = out / "stream_truth.jsonl"
        write_file_atomically(paths["stream_truth"], _jsonl(
            [{"line": number, "doubtful": line["doubtful"]} for number, line in enumerate(stream, 1)]))
    except OSError as error:
        raise StreamtagError(f"cannot write demo data to {out}: {error.strerror or error}") from None
    return paths


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m streamtag.demo.generate",
                                     description="Write the invented demo data sets and demo stream.")
    parser.add_argument("--out", required=True, help="directory to write into (created if missing)")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--train", type=int, default=4000, help="number of training lines")
    parser.add_argument("--dev", type=int, default=500, help="number of development lines")
    parser.add_argument("--test", type=int, default=1000, help="number of test lines")
    parser.add_argument("--stream", type=int, default=2000, help="number of unlabelled stream lines")
    parser.add_argument("--doubtful-share", type=float, default=0.1)
    args = parser.parse_args(argv)
    try:
        paths = write_demo_data(args.out, args.seed, args.train, args.dev, args.test, args.stream,
                                args.doubtful_share)
    except StreamtagError as error:
        print(f"streamtag: {error}", file=sys.stderr)
        return error.exit_code
    for name, path in paths.items():
        print(f"{name}\t{path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
