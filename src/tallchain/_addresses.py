"""Dask scheduler addresses: parsed and checked before any work, and probed with a timeout
(private).

The schemes are those the installed `distributed` registers for connecting between processes
(``distributed/comm/__init__.py``: tcp, tls; ``ws.py``: ws, wss; ``ucx.py``: ucx). Its
``inproc`` scheme connects only within one process, so it cannot reach a scheduler. Every
scheme needs ``host:port``: the TCP-based connectors parse the location with
``parse_host_port`` without a default port.
"""

import ipaddress
import re
import socket

from ._validation import fail

SCHEMES = ("tcp", "tls", "ws", "wss", "ucx")
#: Seconds to wait for a scheduler to answer (RunOptions.connect_seconds, [compute]).
CONNECT_SECONDS = 10.0
_LABEL = re.compile(r"^(?!-)[A-Za-z0-9-]{1,63}(?<!-)$")
_FIX = "give scheme://host:port, e.g. tcp://10.0.0.5:8786 (schemes: " + ", ".join(SCHEMES) + ")"


def looks_like_address(value):
    """A string with ``://``: meant as a scheduler address (checked by `parse_address`)."""
    return isinstance(value, str) and "://" in value


def parse_address(address, name="scheduler"):
    """``(scheme, host, port)`` of a Dask scheduler address, or InputError naming the part
    that is wrong (scheme, host, port range 1-65535)."""
    scheme, _, loc = address.partition("://")
    if scheme.lower() not in SCHEMES:
        why = ("inproc connects only inside one process" if scheme.lower() == "inproc"
               else f"unknown scheme {scheme!r}")
        fail(name, f"{address!r} is not a Dask scheduler address ({why})", _FIX)
    if loc.startswith("["):
        host, sep, rest = loc[1:].partition("]")
        port = rest[1:] if rest.startswith(":") else None
        ok = sep and _ipv6(host) and rest.startswith(":")
    else:
        host, sep, port = loc.rpartition(":")
        ok = bool(sep)
    if not ok or port is None or port == "":
        fail(name, f"{address!r} has no host:port after {scheme}://", _FIX)
    if not (_ipv6(host) if loc.startswith("[") else _host(host)):
        fail(name, f"{address!r} has an impossible host {host!r}", _FIX)
    if not port.isdigit() or not 1 <= int(port) <= 65535:
        fail(name, f"{address!r} has port {port!r}, outside 1-65535", _FIX)
    return scheme.lower(), host, int(port)


def _ipv6(host):
    try:
        return ipaddress.ip_address(host).version == 6
    except ValueError:
        return False


def _host(host):
    """A dotted IPv4 address with every part in 0-255, or a DNS name (RFC 1123 labels)."""
    parts = host.split(".")
    if all(p.isdigit() for p in parts):
        return len(parts) == 4 and all(int(p) <= 255 for p in parts)
    return 0 < len(host) <= 253 and all(_LABEL.match(p) for p in parts)


def probe_address(address, seconds, name="scheduler", fix_timeout="raise connect_seconds"):
    """Open (and close) a TCP connection to a scheduler address within ``seconds``; an address
    that does not answer is refused in one line, before any data are read."""
    scheme, host, port = parse_address(address, name)
    if scheme == "ucx":     # not plain TCP: left to the Client and its timeout
        return
    try:
        socket.create_connection((host, port), timeout=seconds).close()
    except OSError as exc:
        detail = "no answer" if isinstance(exc, TimeoutError) else (exc.strerror or str(exc))
        fail(name, f"nothing answered at {address} within {seconds:g} s ({detail})",
             f"start the scheduler or check the address; if it is slow to answer, {fix_timeout}")
