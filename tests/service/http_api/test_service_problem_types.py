"""Every problem ``type`` the service can send resolves to a short HTML page it serves itself.

RFC 9457 section 3.1.1: when dereferenced, a problem type URI should provide human-readable
documentation for the problem type. The kinds are found in the code, not listed here: every
string literal passed as the kind of a ``ServiceProblem(...)`` anywhere in service/ (read with
``ast``), and the kind ``problem_for_error`` gives each class of model_store's error hierarchy.
The pages are parsed with the standard library's ``html.parser``.
"""

from __future__ import annotations

import ast
from html.parser import HTMLParser
from pathlib import Path

import pytest

import model_store.errors as errors
from service.problem_types import PROBLEM_TYPES
from service.problems import problem_for_error

_SERVICE = Path(__file__).resolve().parents[3] / "service"


def _argument(node: ast.Call, position: int, name: str):
    value = node.args[position] if len(node.args) > position else next(
        (keyword.value for keyword in node.keywords if keyword.arg == name), None)
    return value.value if isinstance(value, ast.Constant) else None


def _literal_problems() -> set[tuple[str, int, str | None]]:
    """(kind, status, title) of every ServiceProblem built with a literal kind and status."""
    found = set()
    for path in sorted(_SERVICE.glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Call) and getattr(node.func, "id", None) == "ServiceProblem":
                status, kind, title = _argument(node, 0, "status"), _argument(node, 1, "kind"), _argument(node, 2, "title")
                if isinstance(kind, str) and isinstance(status, int):
                    found.add((kind, status, title))
    return found


def _error_problems() -> set[tuple[str, int, str]]:
    found, pending = set(), [errors.RbfgateError]
    while pending:
        cls = pending.pop()
        pending.extend(cls.__subclasses__())
        if cls is not errors.RbfgateError:
            error = cls.__new__(cls)
            Exception.__init__(error, "example")
            problem = problem_for_error(error)
            found.add((problem.kind, problem.status, problem.title))
    return found


_PROBLEMS = {problem for problem in _literal_problems() | _error_problems() if problem[0] != "about:blank"}  # 4.2.1
_USED = {(kind, status) for kind, status, _ in _PROBLEMS}
_KINDS = sorted({kind for kind, _ in _USED})


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.open: list[str] = []
        self.text: dict[str, str] = {}

    def handle_starttag(self, tag, attrs):
        if tag not in ("meta",):
            self.open.append(tag)

    def handle_endtag(self, tag):
        assert self.open.pop() == tag, f"</{tag}> closes something else"

    def handle_data(self, data):
        if self.open:
            self.text[self.open[-1]] = self.text.get(self.open[-1], "") + data


def test_the_code_uses_the_problem_kinds_we_expect_to_find():
    assert {"records-refused", "invalid-request", "breaking-changes", "not-found", "unauthorized"} <= set(_KINDS)


@pytest.mark.parametrize("kind", _KINDS)
def test_every_problem_type_in_the_code_answers_an_html_page(shared_client, kind):
    response = shared_client.get(f"/problems/{kind}")
    assert response.status_code == 200
    assert response.headers["content-type"].split(";")[0] == "text/html"
    page = _Page()
    page.feed(response.text)
    page.close()
    assert page.open == [], page.open
    assert page.text["h1"] == PROBLEM_TYPES[kind].title
    assert "How to fix it" in response.text and "http://" not in response.text and "https://" not in response.text


def test_every_page_belongs_to_a_kind_the_code_uses():
    assert set(PROBLEM_TYPES) == set(_KINDS)


def test_each_page_names_the_status_the_code_sends_with_its_kind():
    assert {(kind, PROBLEM_TYPES[kind].status) for kind, _ in _USED} == _USED


def test_every_problem_of_one_type_carries_the_title_of_its_page():
    # RFC 9457 section 3.1.3: the title "SHOULD NOT change from occurrence to occurrence of the problem".
    titles = {(kind, title) for kind, _, title in _PROBLEMS if title is not None}
    assert titles == {(kind, PROBLEM_TYPES[kind].title) for kind, _ in titles}


def test_a_page_states_the_status_its_problems_carry(shared_client):
    body = shared_client.post("/score/iris", json={"records": [{"sepal_length_cm": 99}]}).json()
    page = shared_client.get(body["type"])  # the relative reference resolves against the service
    assert page.status_code == 200
    assert f"HTTP status {body['status']}" in page.text


def test_an_unknown_problem_type_is_404_problem_details(shared_client):
    response = shared_client.get("/problems/no-such-problem")
    assert response.status_code == 404
    assert response.headers["content-type"] == "application/problem+json"
