"""Running README commands as a reader runs them in one terminal, in one directory.

The environment carries over from one command to the next (``export RBFGATE_STORE=...``,
``TOKEN=$(...)``), as it does in a shell. Three kinds of command are handled apart:

- ``rbfgate serve ...`` runs in the background (stopping the one before), on a free port handed
  over in ``RBFGATE_SERVE_PORT`` (serve reads it when ``--port`` is not given), and is waited for
  until ``/readyz`` answers 200;
- ``curl ...`` is expanded by bash (quotes, variables, substitutions, exactly as the reader's shell
  does) and sent with httpx, to that port instead of 8000; options outside the few the README uses
  are refused, so a curl line the session does not understand fails instead of being guessed at;
- anything else runs in ``bash -c`` and must exit 0.

A ``.venv`` link in the directory points at the Python environment running the tests, so the
quick start's ``.venv/bin/rbfgate`` runs the installed ``rbfgate`` as written.
"""

from __future__ import annotations

import os
import re
import shlex
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

import httpx

from readme_blocks import rbfgate_argvs, words
from tests.process_control import free_port, stop_process_group, wait_until_ok

__all__ = ["CommandFailed", "CurlRequest", "ReadmeSession", "parse_curl"]

README_ORIGIN = "http://127.0.0.1:8000"  # where the README's curl lines send their requests
_COMMAND_SECONDS = 180  # one command of the paths (the demo trains a model); a hang fails, never blocks
_SHELL_NOISE = frozenset({"_", "SHLVL", "PWD", "OLDPWD"})
_FILENAME = re.compile(r"""filename="?([^";]+)"?""")


class CommandFailed(AssertionError):
    """A README command did not do what a reader would see it do; says which and why."""


@dataclass
class CurlRequest:
    """One curl command line, as curl would send it."""

    method: str
    url: str
    headers: list[tuple[str, str]] = field(default_factory=list)
    body: str | None = None
    output: str | None = None  # -o FILE
    remote_name: bool = False  # -O: name the file after the URL, or with -J after Content-Disposition
    header_name: bool = False  # -J


def parse_curl(words: list[str]) -> CurlRequest:
    """The request of ``curl WORDS...`` (the words after bash's expansion), for the options the
    README uses: -s, -X, -H, -d, -o, -O, -J (short ones may be grouped, as in ``-OJ``)."""
    method, url, headers, body, output, remote, by_header = None, None, [], None, None, False, False
    index = 0
    while index < len(words):
        word = words[index]
        index += 1
        if word in ("-X", "--request", "-H", "--header", "-d", "--data", "--data-raw", "-o", "--output"):
            if index == len(words):
                raise CommandFailed(f"curl option {word} needs a value")
            value = words[index]
            index += 1
            if word in ("-X", "--request"):
                method = value
            elif word in ("-H", "--header"):
                name, _, text = value.partition(":")
                headers.append((name.strip(), text.strip()))
            elif word in ("-d", "--data", "--data-raw"):
                if value.startswith("@") and word != "--data-raw":
                    raise CommandFailed(f"curl {word} @FILE (a body read from a file) is not sent by the README tests")
                body = value
            else:
                output = value
        elif word == "--silent":
            continue
        elif word.startswith("-") and len(word) > 1 and not word.startswith("--") and set(word[1:]) <= set("sOJ"):
            remote = remote or "O" in word
            by_header = by_header or "J" in word
        elif word.startswith("-"):
            raise CommandFailed(f"curl option {word} is not one the README tests know how to send")
        elif url is None:
            url = word
        else:
            raise CommandFailed(f"curl given a second URL {word!r}")
    if url is None:
        raise CommandFailed("curl without a URL")
    if body is not None and not any(name.lower() == "content-type" for name, _ in headers):
        headers.append(("Content-Type", "application/x-www-form-urlencoded"))  # what curl -d sends
    return CurlRequest(method or ("POST" if body is not None else "GET"), url, headers, body, output, remote, by_header)


class ReadmeSession:
    """One reader's terminal: a directory, an environment, and at most one ``rbfgate serve``."""

    def __init__(self, workdir: Path) -> None:
        self.workdir = workdir
        self.bin_dir = Path(sys.executable).parent
        if not (self.bin_dir / "rbfgate").exists():
            raise CommandFailed(f"no installed rbfgate beside {sys.executable}: install the package "
                                "(pip install -e '.[test]') in the environment that runs the tests")
        (workdir / ".venv").symlink_to(Path(sys.prefix), target_is_directory=True)
        self.port = free_port()
        self.env = {**os.environ, "PATH": f"{self.bin_dir}{os.pathsep}{os.environ.get('PATH', '')}",
                    "RBFGATE_SERVE_PORT": str(self.port), "HOME": str(workdir)}
        for inherited in ("RBFGATE_STORE", "RBFGATE_TOKENS", "XDG_DATA_HOME"):  # the reader starts afresh
            self.env.pop(inherited, None)
        self.server: subprocess.Popen | None = None
        # The session's own files live beside the reader's directory, so that what is left in it is
        # exactly what the README's commands wrote.
        self._own = workdir.parent / f"{workdir.name}-session"
        self._own.mkdir(exist_ok=True)
        self._server_log = self._own / "serve.log"
        self.last_response: httpx.Response | None = None

    def run(self, command: str) -> None:
        """Run one logical command line of a README shell block."""
        argvs = rbfgate_argvs(command)
        if argvs and argvs[0][:1] == ["serve"]:
            self._serve(command, argvs)
        elif command.split(None, 1)[:1] == ["curl"]:
            self._curl(command)
        else:
            self._bash(command)

    def run_python(self, source: str, line: int) -> None:
        script = self._own / f"readme-block-{line}.py"
        script.write_text(source, encoding="utf-8")
        try:
            result = subprocess.run([sys.executable, str(script)], cwd=self.workdir, env=self.env,
                                    capture_output=True, text=True, timeout=_COMMAND_SECONDS)
        except subprocess.TimeoutExpired as exc:
            raise CommandFailed(f"the python block at README line {line} ran over {_COMMAND_SECONDS} s") from exc
        if result.returncode != 0:
            raise CommandFailed(f"python block exited {result.returncode}\n{result.stdout}{result.stderr}")

    def close(self) -> None:
        stop_process_group(self.server, timeout=10)
        self.server = None

    def _bash(self, command: str) -> None:
        environment_file = self._own / "environment"
        script = f"set -a -o pipefail\n{command}\nstatus=$?\nenv -0 > {shlex.quote(str(environment_file))}\nexit $status\n"
        try:
            result = subprocess.run(["bash", "-c", script], cwd=self.workdir, env=self.env,
                                    capture_output=True, text=True, timeout=_COMMAND_SECONDS)
        except subprocess.TimeoutExpired as exc:
            raise CommandFailed(f"still running after {_COMMAND_SECONDS} s: {command}") from exc
        if result.returncode != 0:
            raise CommandFailed(f"exited {result.returncode}: {command}\n{result.stdout}{result.stderr}")
        pairs = environment_file.read_bytes().decode().split("\0")
        self.env = {name: value for name, _, value in (pair.partition("=") for pair in pairs if pair)
                    if name not in _SHELL_NOISE}

    def _serve(self, command: str, argvs: list[list[str]]) -> None:
        [argv] = argvs
        written = words(command)
        if written not in ([*written[:1], *argv], [*written[:1], *argv, "&"]):
            raise CommandFailed(f"a runnable serve line must hold the serve command alone: {command}")
        if "--port" in argv or "--host" in argv:
            raise CommandFailed(f"a runnable serve line must use the default address: {command}")
        self.close()
        log = self._server_log.open("ab")
        self.server = subprocess.Popen([str(self.bin_dir / "rbfgate"), *argv], cwd=self.workdir, env=self.env,
                                       stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
        log.close()
        try:
            wait_until_ok(self.server, f"http://127.0.0.1:{self.port}/readyz", timeout=60,
                          describe=lambda: self._server_log.read_text(errors="replace")[-3000:])
        except RuntimeError as exc:
            raise CommandFailed(f"{command}: {exc}") from exc

    def _curl(self, command: str) -> None:
        expanded = subprocess.run(["bash", "-c", "printf '%s\\0' " + command[len("curl"):]], cwd=self.workdir,
                                  env=self.env, capture_output=True, text=True, timeout=30)
        if expanded.returncode != 0:
            raise CommandFailed(f"bash could not expand: {command}\n{expanded.stderr}")
        request = parse_curl(expanded.stdout.split("\0")[:-1])
        if not request.url.startswith(README_ORIGIN + "/"):
            raise CommandFailed(f"a runnable curl line must call {README_ORIGIN}: {command}")
        url = f"http://127.0.0.1:{self.port}" + request.url[len(README_ORIGIN):]
        try:
            response = httpx.request(request.method, url, headers=request.headers,
                                     content=None if request.body is None else request.body.encode(), timeout=60)
        except httpx.HTTPError as exc:
            raise CommandFailed(f"no answer ({exc!r}) for: {command}") from exc
        if not response.is_success:
            raise CommandFailed(f"HTTP {response.status_code} for: {command}\n{response.text[:2000]}")
        self.last_response = response
        target = self._output_file(request, response)
        if target is not None:
            target.write_bytes(response.content)

    def _output_file(self, request: CurlRequest, response: httpx.Response) -> Path | None:
        if request.output is not None:
            return self.workdir / request.output
        if not request.remote_name:
            return None
        name = request.url.rstrip("/").rsplit("/", 1)[-1]
        disposition = _FILENAME.search(response.headers.get("content-disposition", ""))
        if request.header_name and disposition:
            name = disposition.group(1)
        target = self.workdir / Path(name).name
        if target.exists():  # curl -J never overwrites a file
            raise CommandFailed(f"curl -OJ would not overwrite {target.name}")
        return target
