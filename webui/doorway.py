"""The page's front door inside waitress: requests judged on their headers, before any body.

How waitress (3.0) reads a request: its I/O thread parses the headers (`HTTPRequestParser`),
then stores the whole body — in memory up to `inbuf_overflow`, then in an anonymous temporary
file — and only a complete request reaches a worker thread and the app. A check in the app runs
too late to save the disk. So the check happens here, in a parser that asks, the moment the
headers are parsed, whether the request may send its body:

- without a farm login (no session cookie, a forged, ended or outdated one, or a viewer's), a
  body may be at most `ANON_BODY_BYTES` (the login form) and not chunked;
- a body announced above the upload limit is refused (413 naming the limit);
- at most `MAX_UPLOADS` uploads (a body above `ANON_BODY_BYTES`, a chunked one, or any POST to
  /api/submit) arrive or are handled at once; another one is told to come back (503).

A refused request is completed with no body and `Connection: close`: none of its body is read
(a client that sends it anyway meets a closed connection), and the app answers it with the same
one-line JSON or page as any refusal (the environ key `REFUSED` carries code and message).

Connections: waitress stops accepting when `connection_limit` are open, and closed idle ones only
after `channel_timeout`, so a crowd of idle connections shut everybody out. Here the server looks
at its connections every second and closes one that took more than `HEADER_SECONDS` to send its
headers, kept a finished connection idle for `IDLE_SECONDS`, or sends its body too slowly; and
when the limit is near, it closes the connections idle the longest (none being answered, no
logged-in upload arriving) to make room for new ones.
"""

from __future__ import annotations

import functools
import threading
import time

from waitress.channel import HTTPChannel
from waitress.parser import HTTPRequestParser
from waitress.server import TcpWSGIServer
from waitress.task import WSGITask
from waitress.utilities import RequestEntityTooLarge

REFUSED = "lampyr.refused"  # environ key: (code, message, extra headers)
ANON_BODY_BYTES = 64 * 1024  # a login form is < 1 KiB (rule of thumb: ample room)
MAX_UPLOADS = 3  # uploads arriving or being unpacked at once (each may spool 512 MiB)
HEADER_SECONDS = 10.0  # from a connection's (or request's) first byte to its blank line
IDLE_SECONDS = 30.0  # a connection between requests (browsers open a new one when closed)
BODY_IDLE_SECONDS = 20.0  # a body that stops arriving
BODY_GRACE_SECONDS = 10.0  # after which a body must average MIN_BODY_RATE
MIN_BODY_RATE = 16 * 1024  # bytes/s (rule of thumb: a slow Wi-Fi moves 100× that)
CONNECTIONS = 100  # open connections at most (waitress's default)
EVICT_ROOM = 10  # connections freed at once when the limit is near
HEADER_BYTES = 64 * 1024  # request line and headers (a cookie and a few headers need ~2 KiB)


def too_big(limit: int) -> str:
    return (f"upload: larger than this farm's limit of {limit / 1024**2:g} MiB "
            "(shot file and assets archive together)")


class Door:
    """The decisions on headers, and the count of uploads in progress."""

    def __init__(self, app, max_upload: int):
        self.app = app
        self.max_upload = max_upload
        self.lock = threading.Lock()
        self.uploads = 0

    def judge(self, req) -> tuple | None:
        """(code, message, headers) refusing `req` on its headers, or None; sets `req.upload`
        when it holds one of the upload places."""
        from .auth import role_of_cookie

        if not (req.chunked or req.content_length > 0):
            return None
        path = "/" + req.path.lstrip("/")
        small = not req.chunked and req.content_length <= ANON_BODY_BYTES
        try:
            who = role_of_cookie(self.app, req.headers.get("COOKIE"))
        except Exception:  # in the server's only I/O thread: whatever it is, no login
            self.app.logger.exception("session check on headers failed")
            who = None
        if who != "farm" and not small:
            if who == "viewer":
                return 403, "this login can look but not change anything (a viewer login)", {}
            return (401 if path.startswith("/api/") else 403), "log in first", {}
        if req.content_length > self.max_upload:
            return 413, too_big(self.max_upload), {}
        if who == "farm" and (not small or path == "/api/submit"):
            with self.lock:
                if self.uploads >= MAX_UPLOADS:
                    return (503, f"upload: {MAX_UPLOADS} uploads are already arriving or being "
                                 "unpacked on this farm; try again when one has finished",
                            {"Retry-After": "30"})
                self.uploads += 1
            req.upload = True
        return None

    def release(self) -> None:
        with self.lock:
            self.uploads -= 1


class GatedParser(HTTPRequestParser):
    """waitress's parser, asking the Door once the headers are in."""

    refusal = None
    upload = False
    body_began = 0.0

    def __init__(self, adj, door: Door):
        super().__init__(adj)
        self.door = door
        self.began = time.time()

    def received(self, data):
        if self.completed:
            return 0
        had_headers = self.headers_finished
        n = super().received(data)
        if not had_headers and self.headers_finished and not self.empty and (
                self.error is None or isinstance(self.error, RequestEntityTooLarge)):
            refusal = self.door.judge(self)
            if refusal is not None:
                self._refuse(*refusal)
                return len(data)  # the rest of this read is body: dropped, never parsed
            self.body_began = time.time()
        elif isinstance(self.error, RequestEntityTooLarge):  # a chunked body grew too large
            self._refuse(413, too_big(self.door.max_upload), {})
            return len(data)
        return n

    def _refuse(self, code: int, message: str, extra: dict) -> None:
        if self.body_rcv is not None:
            self.body_rcv.getbuf().close()
            self.body_rcv = None
        self.error = None
        self.chunked = False
        self.content_length = 0
        self.headers["CONTENT_LENGTH"] = "0"
        self.headers["CONNECTION"] = "close"
        self.expect_continue = False
        self.connection_close = True
        self.refusal = (code, message, extra)
        self.completed = True

    def close(self):
        super().close()
        if self.upload:
            self.upload = False
            self.door.release()


class GatedTask(WSGITask):
    def get_environment(self):
        environ = super().get_environment()
        if getattr(self.request, "refusal", None) is not None:
            environ[REFUSED] = self.request.refusal
        return environ


class GatedChannel(HTTPChannel):
    task_class = GatedTask

    def __init__(self, server, sock, addr, adj, map=None):
        super().__init__(server, sock, addr, adj, map)
        self.parser_class = functools.partial(GatedParser, door=server.door)

    def handle_close(self):
        req, self.request = self.request, None
        if req is not None:  # a request cut off part-way: its buffer and upload place go
            req.close()
        super().handle_close()

    def overdue(self, now: float) -> bool:
        """Whether this connection, not being answered, has waited or dawdled too long."""
        req = self.request
        if req is None:
            fresh = self.last_activity == self.creation_time
            return now - self.last_activity > (HEADER_SECONDS if fresh else IDLE_SECONDS)
        if not req.headers_finished:
            return now - req.began > HEADER_SECONDS
        if now - self.last_activity > BODY_IDLE_SECONDS:
            return True
        took = now - req.body_began
        return took > BODY_GRACE_SECONDS and req.body_bytes_received < MIN_BODY_RATE * took


class GatedServer(TcpWSGIServer):
    """waitress's TCP server with the Door, the timeouts above, and room made at the limit."""

    channel_class = GatedChannel

    def __init__(self, application, door: Door, **kw):
        self.door = door
        super().__init__(application, **kw)

    def maintenance(self, now):  # every cleanup_interval (1 s)
        for ch in list(self.active_channels.values()):
            if not ch.requests and not ch.will_close and ch.overdue(now):
                ch.will_close = True  # closed by the loop's next pass (HTTPChannel.handle_write)

    def readable(self):
        if self.accepting:
            self._make_room()
        return super().readable()

    def _make_room(self) -> None:
        channels = list(self.active_channels.values())
        closing = sum(1 for ch in channels if ch.will_close)
        excess = len(channels) - closing - (CONNECTIONS - EVICT_ROOM)
        if len(channels) - closing < CONNECTIONS - 1 or excess <= 0:
            return
        idle = [ch for ch in channels if not ch.will_close and not ch.requests
                and not (ch.request is not None and ch.request.upload)]
        idle.sort(key=lambda ch: ch.last_activity)
        for ch in idle[:excess]:
            ch.will_close = True


def make_server(app, host: str, port: int, threads: int, max_upload: int) -> GatedServer:
    """The server for `app` on host:port (the first address the host name gives)."""
    from waitress.adjustments import Adjustments

    adj = Adjustments(host=host, port=port, threads=threads, ident="lampyr",
                      connection_limit=CONNECTIONS + 2,  # + the listening socket and trigger
                      cleanup_interval=1, channel_timeout=int(IDLE_SECONDS),
                      max_request_header_size=HEADER_BYTES,
                      max_request_body_size=max_upload + 1024 * 1024)
    return GatedServer(app, Door(app, max_upload), adj=adj, sockinfo=adj.listen[0])
