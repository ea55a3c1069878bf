"""Security by default: the token, the Host check, the body limit and path confinement.

``Guard`` is a plain ASGI middleware in front of every route, so no route can forget a check:

- a mutating call (anything but GET/HEAD/OPTIONS) needs ``Authorization: Bearer <token>``; when
  the service is bound beyond loopback, every call does. The token travels only in that header,
  never in an address (addresses end up in browser history, logs and Referer headers); the one
  exception to "every call" is the status page itself (``public_pages``), static HTML that holds
  no data and asks for the token, then sends it as the header on each of its calls;
- the Host header is parsed strictly (``parse_host``): a missing, repeated or malformed one is a
  400 (RFC 9112 section 3.2 asks exactly that of a server); bound to loopback, a well-formed Host
  that names anything but loopback is a 421 Misdirected Request (RFC 9110 section 15.5.20: this
  service answers only for its loopback names), so a web page that rebinds its own domain name to
  127.0.0.1 cannot read the API through the browser. Any port is accepted (an ``ssh -L`` tunnel
  changes it); the name decides;
- a body over the limit is refused before any route sees it (it is read into memory by the guard,
  at most ``max_body`` bytes, then replayed to the route).

``confine`` resolves a path from a request (symlinks followed) and refuses it unless it lies inside
one of the configured roots. Nothing from a request is ever handed to a shell: the service starts
its workers with a fixed argument list and passes jobs through the store.
"""
from __future__ import annotations

import hmac
import ipaddress
import json
import re
import string
from pathlib import Path
from urllib.parse import urlsplit

from ..errors import AlignError

SAFE_METHODS = ("GET", "HEAD", "OPTIONS")
# letters, digits and the punctuation of a host name, an IPv4 address, a bracketed IPv6 address and
# a port: no userinfo ('@'), path, query, percent-escapes or white space, which a Host never needs
HOST_CHARACTERS = frozenset(string.ascii_letters + string.digits + ".-:[]")
NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


class PathRefused(AlignError):
    """A path from a request points outside the configured roots."""


def check_name(name: str, what: str) -> str:
    """A plain file or folder name: letters, digits, ``.``, ``_``, ``-``; no separators, no ``..``."""
    if not isinstance(name, str) or not NAME_PATTERN.match(name) or ".." in name:
        raise PathRefused(f"{what} {name!r} is not a plain name",
                          "use 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit")
    return name


def confine(raw: str, roots: list[Path], what: str, base: Path | None = None) -> Path:
    """The resolved path of ``raw`` when it lies inside one of ``roots``; PathRefused otherwise.

    ``..`` is refused outright (even when it would land inside a root), and symlinks are followed
    before the check, so a link inside a root that points outside it is refused as well. A
    relative path is taken relative to ``base`` (default: the first root). The path must exist.
    """
    roots_hint = "allowed roots: " + ", ".join(str(r) for r in roots)
    if not isinstance(raw, str) or not raw or "\x00" in raw:
        raise PathRefused(f"{what} must be a non-empty path", roots_hint)
    path = Path(raw)
    if ".." in path.parts:
        raise PathRefused(f"{what} {raw!r} contains '..'", "give the path without '..'; " + roots_hint)
    if not path.is_absolute():
        path = (base or roots[0]) / path
    try:
        resolved = path.resolve(strict=True)
    except (OSError, RuntimeError):  # missing, or a symlink loop
        if any(_inside(path.absolute(), r) for r in roots):
            raise PathRefused(f"{what} {raw!r} does not exist", roots_hint) from None
        raise PathRefused(f"{what} {raw!r} is outside the allowed roots", roots_hint) from None
    for root in roots:
        if _inside(resolved, root.resolve()):
            return resolved
    raise PathRefused(f"{what} {raw!r} is outside the allowed roots (it resolves to {resolved})", roots_hint)


def _inside(path: Path, root: Path) -> bool:
    return path == root or path.is_relative_to(root)


def token_matches(expected: str, given: str | None) -> bool:
    # constant-time comparison: the time taken does not tell how much of a guess was right
    return given is not None and hmac.compare_digest(expected.encode(), given.encode())


class Guard:
    """ASGI middleware: Host check, token check and body limit, before any route runs."""

    def __init__(self, app, *, token: str, token_for_reads: bool, loopback_only: bool, max_body: int,
                 public_pages: tuple[str, ...] = ()):
        self.app = app
        self.token = token
        self.token_for_reads = token_for_reads
        self.loopback_only = loopback_only  # Host must name loopback (bound to loopback)
        self.max_body = max_body
        self.public_pages = public_pages  # paths a GET may read without the token (pages holding no data)

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        method = scope["method"].upper()
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}

        hosts = [v.decode("latin-1") for k, v in scope.get("headers", []) if k.lower() == b"host"]
        refusal = host_refusal(hosts, loopback_only=self.loopback_only)
        if refusal:
            return await _refuse(send, *refusal)
        public = method in ("GET", "HEAD") and scope.get("path") in self.public_pages
        needs_token = method not in SAFE_METHODS or (self.token_for_reads and not public)
        if needs_token and not token_matches(self.token, _given_token(headers)):
            return await _refuse(send, 401, "this call needs the service token",
                                 "send the header 'Authorization: Bearer <token>'; the token is in HOME/token "
                                 "(align jobs reads it from there)", {"www-authenticate": "Bearer"})

        declared = headers.get("content-length")
        if declared is not None:
            if not declared.isdigit():
                return await _refuse(send, 400, "the Content-Length header is not a number")
            if int(declared) > self.max_body:
                return await _refuse(send, 413, f"the request body is {declared} bytes; the limit is {self.max_body}",
                                     "send less per call (the limit is align serve --max-body-bytes)")
        if method in SAFE_METHODS:
            return await self.app(scope, receive, send)

        # Read the body here, bounded, so a chunked body without a length cannot get past the limit.
        body = bytearray()
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            body += message.get("body", b"")
            if len(body) > self.max_body:
                return await _refuse(send, 413, f"the request body is over the limit of {self.max_body} bytes",
                                     "send less per call (the limit is align serve --max-body-bytes)")
            if not message.get("more_body", False):
                break
        replayed = False

        async def replay():
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": bytes(body), "more_body": False}
            return await receive()

        return await self.app(scope, replay, send)


class MalformedHost(ValueError):
    """A Host header value that is not ``name[:port]``."""


def parse_host(value: str) -> tuple[str, int | None]:
    """(name, port) of a Host header value: ``127.0.0.1:8765`` -> ("127.0.0.1", 8765), ``[::1]`` -> ("::1", None).

    urllib's parser splits it; the value must then read back exactly as ``name[:port]`` (case
    aside), so anything it tolerates but a Host may not hold (an empty port, leading zeros, text
    after the port) is refused too. MalformedHost says what is wrong.
    """
    if not value:
        raise MalformedHost("it is empty")
    stray = sorted(set(value) - HOST_CHARACTERS)
    if stray:
        raise MalformedHost(f"{value!r} holds {''.join(stray)!r}, which a host name and port never do")
    try:
        parts = urlsplit("//" + value)
        name, port = parts.hostname, parts.port
    except ValueError as exc:  # a port that is not a number, unbalanced brackets, a bad IPv6 literal
        raise MalformedHost(f"{value!r} is not a host name and port ({exc})") from None
    if not name or port == 0:
        raise MalformedHost(f"{value!r} has no host name" if not name else f"{value!r} names port 0")
    canonical = (f"[{name}]" if ":" in name else name) + ("" if port is None else f":{port}")
    if canonical != value.lower():
        raise MalformedHost(f"{value!r} is not of the form name[:port] (read as {canonical!r})")
    return name, port


def is_loopback_name(name: str) -> bool:
    if name == "localhost":
        return True
    try:
        return ipaddress.ip_address(name).is_loopback
    except ValueError:
        return False  # any other name may resolve anywhere, which is what a rebinding page relies on


def host_refusal(values: list[str], loopback_only: bool) -> tuple[int, str, str] | None:
    """(status, message, hint) refusing the request's Host header(s), or None when they are acceptable."""
    example = "call the service as http://127.0.0.1:PORT (or localhost:PORT, [::1]:PORT)"
    if len(values) != 1:
        return 400, f"the request has {len(values)} Host headers; HTTP/1.1 needs exactly one", example
    try:
        name, _ = parse_host(values[0])
    except MalformedHost as exc:
        return 400, f"the Host header is malformed: {exc}", example
    if loopback_only and not is_loopback_name(name):
        return 421, f"the Host header names {name!r}, not this machine's loopback; this service answers " \
                    "only for 127.0.0.1, localhost and ::1", example
    return None


def _given_token(headers: dict) -> str | None:
    """The bearer token of the Authorization header; a token in the query string is not read."""
    auth = headers.get("authorization", "")
    if auth.lower().startswith("bearer "):
        return auth[7:].strip()
    return None


async def _refuse(send, status: int, message: str, hint: str | None = None, extra: dict | None = None) -> None:
    body = json.dumps({"error": message, "hint": hint}).encode()
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
               (b"connection", b"close")]
    headers += [(k.encode(), v.encode()) for k, v in (extra or {}).items()]
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})
