"""The score routes' lean path: ``POST /score/{model}`` and its pinned-version twin without FastAPI's dispatch.

A one-record request spent more server CPU in FastAPI's and Starlette's per-request machinery
than in scoring (tests/benchmarks, py-spy on a real ``rbfgate serve`` under wrk): the router
trying every route in turn, dependency solving for the access rule, query parameters parsed for
a route that takes none, an exit stack, the exception middleware and the endpoint wrapper. This
ASGI middleware sits inside the app's own middlewares (request id, access log and metrics, the
header cap, the server-error handler) and in front of FastAPI's routing. For a POST it matches
the two score routes' own ``APIRoute`` objects (the same path templates and parameter rules the
router uses; they are the app's first routes, so the router would pick them too) and, on a match,
does what FastAPI would do, each part through the implementation the app uses:

- the access rule: ``service.auth.admit`` (FastAPI runs the same function as its dependency);
- the handler: the route's own endpoint, called with its path parameters and the ``Request``;
- expected errors: ``service.problems.known_problem`` and ``problem_response``, as the app's
  exception handlers answer them; anything else propagates to the server-error handler, as it
  does from FastAPI.

Everything else, including the score paths with another method (405), goes to the app. The
routes stay registered in FastAPI, so the OpenAPI documents list them as before.
"""

from __future__ import annotations

from collections.abc import Sequence

from fastapi.routing import APIRoute
from starlette.requests import Request
from starlette.routing import Match
from starlette.types import ASGIApp, Receive, Scope, Send

from service.auth import Authenticator, admit
from service.problems import known_problem, problem_response

__all__ = ["SCORE_PATHS", "ScoreDispatch", "score_routes"]

SCORE_PATHS = ("/score/{model}", "/score/{model}/versions/{version}")


def score_routes(routes: Sequence[object]) -> list[APIRoute]:
    """The app's POST score routes, in the app's order; they must come before every other route,
    so that the router, had it run, would have chosen the same one."""
    chosen = [route for route in routes if isinstance(route, APIRoute) and route.path in SCORE_PATHS]
    if len(chosen) != len(SCORE_PATHS) or list(routes[:len(chosen)]) != chosen:
        raise RuntimeError(f"the score routes {SCORE_PATHS} must be the app's first routes, each once")
    if any(route.methods != {"POST"} for route in chosen):
        raise RuntimeError("the score routes take POST only")
    return chosen


class ScoreDispatch:
    """ASGI middleware: answer the score routes directly; pass every other request to ``app``."""

    def __init__(self, app: ASGIApp, *, routes: Sequence[APIRoute], authenticator: Authenticator) -> None:
        self.app = app
        self.routes = tuple(routes)
        self.authenticator = authenticator

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["method"] == "POST":
            for route in self.routes:
                match, child_scope = route.matches(scope)
                if match is Match.FULL:
                    scope.update(child_scope)  # endpoint, path_params and route, as the router sets them
                    await self._answer(route, scope, receive, send)
                    return
        await self.app(scope, receive, send)

    async def _answer(self, route: APIRoute, scope: Scope, receive: Receive, send: Send) -> None:
        try:
            admit(self.authenticator, scope)
            response = await route.endpoint(request=Request(scope, receive), **scope["path_params"])
        except Exception as exc:
            problem = known_problem(exc)
            if problem is None:
                raise  # a bug: the server-error handler logs it and answers 500, as from FastAPI
            response = problem_response(problem)
        await response(scope, receive, send)
