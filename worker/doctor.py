"""`lampyr doctor ADDRESS`: can this machine join the farm at ADDRESS, and if not, why not.

Each check gives one line with a verdict — `ok`, `problem` (the worker would not work) or
`note` (it would, with a remark) — and says what is wrong in plain words. The checks: the
address itself, the network (a TCP connection), the password, the head's protocol version, the
folder of compiled kernels, and a tiny render on this machine whose answer is known.
"""

from __future__ import annotations

import socket
import time
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import urlparse

from ..scheduler import protocol as P

OK, PROBLEM, NOTE, SKIPPED = "ok", "problem", "note", "not checked"


@dataclass
class Check:
    name: str
    verdict: str
    text: str

    def line(self) -> str:
        return f"[{self.verdict}] {self.name}: {self.text}"


def _address(url: str) -> tuple[Check, tuple[str, int] | None]:
    u = urlparse(url)
    if u.scheme not in ("redis", "rediss") or not u.hostname:
        return Check("address", PROBLEM, f"{url!r} is not a farm address: expected "
                     "redis://[:PASSWORD@]HOST:PORT/0 as `lampyr head` prints it"), None
    try:
        port = u.port or 6379
    except ValueError:
        return Check("address", PROBLEM, f"the port in {url!r} is not a number"), None
    return Check("address", OK, f"host {u.hostname}, port {port}"
                 + (", with a password" if u.password else ", without a password")), (u.hostname, port)


def _network(host: str, port: int) -> Check:
    try:
        with socket.create_connection((host, port), timeout=5):
            return Check("network", OK, f"reached {host}:{port}")
    except socket.gaierror:
        return Check("network", PROBLEM, f"the host name {host!r} is not known here: check the "
                     "spelling, or use the head's IP address")
    except ConnectionRefusedError:
        return Check("network", PROBLEM, f"nothing listens on {host}:{port}: is `lampyr head` "
                     "running there, on that port, and listening beyond loopback (--listen)?")
    except (socket.timeout, TimeoutError):
        return Check("network", PROBLEM, f"no answer from {host}:{port} within 5 s: the machine "
                     "may be off, or a firewall drops the connection")
    except OSError as err:
        return Check("network", PROBLEM, f"cannot connect to {host}:{port}: {err.strerror or err}")


def _password_and_protocol(url: str) -> list[Check]:
    import redis

    from ..scheduler.store import connect

    r = connect(url, check=False)
    has_password = bool(urlparse(url).password)
    try:
        r.ping()
    except redis.exceptions.AuthenticationError as err:
        if "without any password configured" in str(err):
            text = "the address carries a password but this farm has none: use the address the head prints"
        elif has_password:
            text = "the farm refused the password: use the address the head prints now (it may have a new one)"
        else:
            text = "the farm requires a password: use the whole address the head prints"
        return [Check("password", PROBLEM, text), Check("protocol", SKIPPED, "needs the password")]
    except redis.exceptions.ResponseError as err:
        if "NOAUTH" in str(err):
            return [Check("password", PROBLEM, "the farm requires a password: use the whole "
                          "address the head prints"), Check("protocol", SKIPPED, "needs the password")]
        return [Check("password", PROBLEM, f"the server answered: {err}"),
                Check("protocol", SKIPPED, "needs a working connection")]
    except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError) as err:
        from .connect import reason

        return [Check("password", PROBLEM, f"the connection broke: {reason(err)} (is it a Redis "
                      "server at all?)"), Check("protocol", SKIPPED, "needs a working connection")]
    out = [Check("password", OK, "accepted" if has_password else "none needed")]
    theirs = r.get(P.K_PROTOCOL)
    if theirs is None:
        out.append(Check("protocol", PROBLEM, "Redis answers, but no lampyr head has set it up: "
                         "start `lampyr head` (with --redis pointing here)"))
    elif int(theirs) != P.PROTOCOL_VERSION:
        out.append(Check("protocol", PROBLEM, str(P.ProtocolSkew(int(theirs)))))
    else:
        try:
            live = sum(1 for _ in r.scan_iter(match=P.key("host", "*"), count=500))
            others = f"; {live} worker(s) on the farm now"
        except redis.exceptions.NoPermissionError:  # the `worker` user may not list keys
            others = ""
        out.append(Check("protocol", OK, f"the head speaks wire protocol {P.PROTOCOL_VERSION}, as "
                         f"this lampyr does{others}"))
    return out


def _kernel_cache() -> Check:
    import os

    from ..engine import NUMBA_CACHE_DIR

    folder = Path(os.environ.get("NUMBA_CACHE_DIR", NUMBA_CACHE_DIR))
    try:
        folder.mkdir(parents=True, exist_ok=True)
        probe = folder / f".doctor-{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as err:
        return Check("kernel cache", PROBLEM, f"cannot write {folder} ({err.strerror or err}): "
                     "every worker start would compile the kernels again; set LAMPYR_CACHE to a "
                     "writable folder")
    if any(folder.rglob("*.nbi")):
        return Check("kernel cache", OK, f"compiled kernels are kept in {folder}")
    return Check("kernel cache", NOTE, f"no compiled kernels in {folder} yet: the tiny render "
                 "below (or the first batch) compiles them once, about a minute")


# a sphere of albedo RHO in a uniform environment of radiance L, seen from outside
_L = 0.5
_RHO = 0.5
_SHOT = {
    "name": "doctor", "frames": 1, "image": {"width": 16, "height": 16},
    "sampling": {"samples": 16, "bounces": 3, "seed": 3},
    "camera": {"position": [0, 0, 4], "target": [0, 0, 0], "fov": 40.0},
    "environment": {"color": [_L, _L, _L]},
    "material": [{"name": "grey", "type": "diffuse", "color": [_RHO, _RHO, _RHO]}],
    "object": [{"name": "ball", "material": "grey", "sphere": {"center": [0, 0, 0], "radius": 1}}],
}


def _tiny_render() -> Check:
    import numpy as np

    from ..engine.render import render_frame
    from ..engine.shot import parse_shot

    start = time.perf_counter()
    try:
        mean = render_frame(parse_shot(_SHOT, root=None), 1, 0, 16, tile_size=16).mean()
    except Exception as err:  # the engine itself fails here: say so, do not crash the doctor
        return Check("render", PROBLEM, f"the test render failed: {type(err).__name__}: {err}")
    took = time.perf_counter() - start
    # a camera ray that misses every object records the environment's radiance (README: pixel
    # values are scene-linear radiance); a convex diffuse object under uniform light L returns
    # rho * L, since every bounce off it escapes (the furnace identity with one bounce)
    corner = mean[0, 0]
    centre = mean[6:10, 6:10].mean(axis=(0, 1))
    if not np.isfinite(mean).all():
        return Check("render", PROBLEM, "the test render has NaN or infinite pixels: the engine "
                     "does not work on this machine (reinstall lampyr; report the CPU model)")
    if not np.allclose(corner, _L, rtol=1e-5) or not np.allclose(centre, _RHO * _L, rtol=0.1):
        return Check("render", PROBLEM, f"the test render is wrong (background {corner[0]:.4f}, "
                     f"expected {_L}; sphere {centre[0]:.4f}, expected about {_RHO * _L}): "
                     "the engine does not work on this machine")
    return Check("render", OK, f"a 16 × 16 test image at 16 samples came out right in {took:.1f} s")


def run_checks(url: str, render: bool = True) -> list[Check]:
    """Every check, in order; a check that needs a failed one is `not checked`."""
    checks = []
    first, where = _address(url)
    checks.append(first)
    if where is None:
        checks += [Check(n, SKIPPED, "needs a farm address") for n in ("network", "password", "protocol")]
    else:
        net = _network(*where)
        checks.append(net)
        if net.verdict == OK:
            checks += _password_and_protocol(url)
        else:
            checks += [Check(n, SKIPPED, "needs the network") for n in ("password", "protocol")]
    checks.append(_kernel_cache())
    if render:
        checks.append(_tiny_render())
    return checks


def summary(checks: list[Check]) -> str:
    problems = sum(1 for c in checks if c.verdict == PROBLEM)
    if problems:
        return f"{problems} problem(s): this machine cannot render for the farm until they are fixed"
    return "everything looks right: `lampyr worker ADDRESS` will join the farm"
