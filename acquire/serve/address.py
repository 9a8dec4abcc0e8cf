"""``HOST:PORT`` for the shape stream: parsing, and refusing non-loopback addresses unless allowed.

Pure (name resolution aside); any thread.
"""
from __future__ import annotations

import ipaddress
import socket

from acquire.errors import UserError

__all__ = ["parse_address", "check_address"]


def parse_address(text: str) -> tuple[str, int]:
    """Split ``HOST:PORT`` (``[::1]:PORT`` for IPv6) into host and port.

    Parameters
    ----------
    text : str
        ``127.0.0.1:8765``, ``localhost:8765``, ``[::1]:8765``; port 0 means
        any free port.

    Returns
    -------
    (host, port) : (str, int)
        Host without brackets.

    Raises
    ------
    UserError
        The text is not of that form; the message names it.
    """
    raw = str(text).strip()
    where = f"publish address {raw!r}"
    if raw.startswith("["):
        end = raw.find("]")
        if end < 0 or not raw[end + 1 :].startswith(":"):
            raise UserError(f"{where}: write an IPv6 address as [ADDRESS]:PORT, e.g. [::1]:8765")
        host, port_text = raw[1:end], raw[end + 2 :]
    else:
        host, sep, port_text = raw.rpartition(":")
        if not sep:
            raise UserError(f"{where}: expected HOST:PORT, e.g. 127.0.0.1:8765")
        if ":" in host:
            raise UserError(f"{where}: write an IPv6 address in brackets, e.g. [::1]:8765")
    if not host:
        raise UserError(f"{where}: no host; e.g. 127.0.0.1:8765")
    if not port_text.isdigit() or not 0 <= int(port_text) <= 65535:
        raise UserError(f"{where}: port must be a number 0..65535 (0 = any free port)")
    return host, int(port_text)


def check_address(text: str, *, allow_remote: bool = False) -> tuple[int, tuple]:
    """Parse and resolve ``HOST:PORT`` and refuse a non-loopback one without ``allow_remote``.

    Cheap and without side effects (nothing is bound): the command line may
    call it before opening a port or creating a recording.

    Returns
    -------
    (family, sockaddr)
        For :func:`socket.socket` and :meth:`socket.socket.bind`.

    Raises
    ------
    UserError
        Bad text, a host that does not resolve, or a non-loopback address
        without ``allow_remote``; the message names the address.
    """
    shown = str(text).strip()
    host, port = parse_address(shown)
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, proto=socket.IPPROTO_TCP)
    except (socket.gaierror, UnicodeError) as exc:
        raise UserError(f"publish address {shown}: host {host!r} not found ({exc})") from None
    infos = [i for i in infos if i[0] in (socket.AF_INET, socket.AF_INET6)]
    if not infos:
        raise UserError(f"publish address {shown}: host {host!r} has no IP address")
    family, _, _, _, sockaddr = infos[0]
    if not allow_remote and not _is_loopback(sockaddr):
        raise UserError(
            f"publish address {shown}: not a loopback address; the stream has no "
            "authentication, so it binds to 127.0.0.1 or [::1] unless --publish-allow-remote is given"
        )
    return family, sockaddr


def _is_loopback(sockaddr) -> bool:
    return ipaddress.ip_address(sockaddr[0].split("%")[0]).is_loopback


def _format_address(host: str, port: int) -> str:
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"
