"""nginx as the load balancer in front of the replicas, run as a foreground process.

The configuration is written for the test: one upstream group with every replica,
``proxy_next_upstream error timeout http_502 http_503`` so a request that finds a replica
dead or not ready goes to the next one, and, for scoring only, ``non_idempotent`` as well:
nginx does not resend a POST that already reached an upstream unless told to, and scoring
changes nothing, so resending it is safe (activate and rollback must never be resent).
The header ``Rbfgate-Test-Upstream`` names the replica(s) nginx tried, last one answering.

Runs as root (workers then drop to ``nobody``) and as an ordinary user. The prefix
directory lives directly under the system temporary directory with mode 0755, because
pytest's own tmp directories are private to the user running the tests.
"""

from __future__ import annotations

import grp
import os
import pwd
import re
import shutil
import signal
import subprocess
import tempfile
from pathlib import Path

from tests.process_control import stop_process_group, wait_until_ok

__all__ = ["UPSTREAM_HEADER", "Balancer", "find_nginx", "render_config"]

_START_SECONDS = 15.0
_STOP_SECONDS = 15.0
UPSTREAM_HEADER = "Rbfgate-Test-Upstream"


def find_nginx() -> str | None:
    """The nginx executable; Debian installs it in /usr/sbin, which a non-root PATH may lack."""
    return shutil.which("nginx", path=os.pathsep.join([os.environ.get("PATH", ""), "/usr/sbin", "/sbin"]))


def render_config(*, prefix: Path, listen_port: int, upstreams: list[str], user_directive: str = "") -> str:
    """nginx.conf text; ``upstreams`` are "127.0.0.1:PORT" addresses."""
    servers = "\n".join(f"        server {address} max_fails=1 fail_timeout=1s;" for address in upstreams)
    temp = "\n".join(f"    {kind}_temp_path {prefix}/{kind}_temp;" for kind in
                     ("client_body", "proxy", "fastcgi", "uwsgi", "scgi"))
    return f"""{user_directive}
worker_processes 1;
events {{
    worker_connections 512;
}}
http {{
{temp}
    log_format upstreams '$msec $status $request_method $uri upstream=$upstream_addr statuses=$upstream_status';
    access_log {prefix}/access.log upstreams;

    upstream rbfgate_replicas {{
{servers}
        keepalive 16;
        keepalive_timeout 4s;  # below the replicas' 5 s, so nginx never reuses a connection they are closing
    }}

    server {{
        listen 127.0.0.1:{listen_port};
        proxy_http_version 1.1;
        proxy_set_header Connection "";
        proxy_connect_timeout 1s;
        proxy_read_timeout 15s;
        proxy_next_upstream error timeout http_502 http_503;
        proxy_next_upstream_tries 3;
        proxy_next_upstream_timeout 10s;
        add_header {UPSTREAM_HEADER} $upstream_addr always;

        location /score/ {{
            # scoring changes nothing: a request whose replica died under it may be sent again
            proxy_next_upstream error timeout http_502 http_503 non_idempotent;
            proxy_pass http://rbfgate_replicas;
        }}
        location / {{
            proxy_pass http://rbfgate_replicas;
        }}
    }}
}}
"""


class Balancer:
    """``with Balancer(nginx, upstreams, port) as balancer:`` -> ``balancer.url``; stopped on exit."""

    def __init__(self, executable: str, upstreams: list[str], listen_port: int) -> None:
        self.executable = executable
        self.upstreams = list(upstreams)
        self.port = listen_port
        self.url = f"http://127.0.0.1:{listen_port}"
        self.prefix: Path | None = None
        self.process: subprocess.Popen | None = None

    def __enter__(self) -> "Balancer":
        self.prefix = Path(tempfile.mkdtemp(prefix="rbfgate-nginx-"))
        self.prefix.chmod(0o755)
        config = self.prefix / "nginx.conf"
        config.write_text(render_config(prefix=self.prefix, listen_port=self.port, upstreams=self.upstreams,
                                        user_directive=_user_directive()))
        globals_ = f"daemon off; pid {self.prefix}/nginx.pid; error_log {self.prefix}/error.log warn;"
        command = [self.executable, "-p", str(self.prefix), "-c", str(config), "-g", globals_]
        if _version(self.executable) >= (1, 19, 5):  # -e: the log used before the configuration is read
            command[1:1] = ["-e", str(self.prefix / "error.log")]
        with open(self.prefix / "nginx.stderr", "wb") as stderr:
            self.process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=stderr, start_new_session=True)
        try:
            self._wait_until_answering()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc_info) -> None:
        try:
            # SIGQUIT is nginx's graceful stop: finish open requests, then exit.
            stop_process_group(self.process, _STOP_SECONDS, first=signal.SIGQUIT)
        finally:
            if self.prefix is not None:
                shutil.rmtree(self.prefix, ignore_errors=True)

    def error_log(self) -> str:
        path = None if self.prefix is None else self.prefix / "error.log"
        return path.read_text(errors="replace")[-3000:] if path is not None and path.exists() else ""

    def _wait_until_answering(self) -> None:
        def describe() -> str:
            stderr = (self.prefix / "nginx.stderr").read_text(errors="replace")
            return f"nginx: {stderr} {self.error_log()}"

        wait_until_ok(self.process, f"{self.url}/healthz", _START_SECONDS, describe, interval=0.05)


def _user_directive() -> str:
    """As root, nginx runs its workers as another user; name one that exists here."""
    if os.geteuid() != 0:
        return ""
    try:
        nobody = pwd.getpwnam("nobody")
    except KeyError:
        return "user root;"
    return f"user nobody {grp.getgrgid(nobody.pw_gid).gr_name};"


def _version(executable: str) -> tuple[int, ...]:
    """(major, minor, patch) from ``nginx -v`` ("nginx version: nginx/1.22.1", on stderr)."""
    result = subprocess.run([executable, "-v"], capture_output=True, text=True, timeout=30)
    found = re.search(r"nginx/(\d+)\.(\d+)\.(\d+)", result.stderr + result.stdout)
    return tuple(int(part) for part in found.groups()) if found else (0, 0, 0)
