"""Login, sessions and the server-side guard of every request.

With login on (``fleetdb serve``), a Flask ``before_request`` hook:

* lets through only the login page and static files without a session;
* finds the user of the session cookie (HttpOnly, SameSite=Lax; the store keeps only the
  token's SHA-256, and ends sessions idle or older than the limits);
* refuses a POST whose ``Origin`` (or ``Referer``) is another site;
* answers 403 to a callback request (``/_dash-update-component``) that would write or export
  when the user's role lacks the right (:data:`CALLBACK_RIGHTS`), before the callback runs;
* sets the request's actor (:mod:`fleetdb.access`), so the library checks its rights again
  where the rule is about data (a technician voids only their own tests) and records every
  write in the audit trail with the user and the remote address.

Without login (``--no-auth``, loopback only) every request acts as the operating-system user
who started the server, origin ``web:<address> (no login)``.
"""

from __future__ import annotations

import html
from datetime import timedelta
from typing import Any
from urllib.parse import quote, urlparse

from flask import Flask, Response, current_app, g, has_request_context, redirect, request

from dashboard import ids
from fleetdb import access, db, users

COOKIE = "fleetdb_session"
AUTH_KEY = "FLEETDB_AUTH"
LIMITS_KEY = "FLEETDB_SESSION_LIMITS"
#: Paths served without a session: the login page and static files (no data in them).
PUBLIC_PREFIXES = ("/login", "/_dash-component-suites/", "/assets/", "/_favicon.ico")

#: What a callback request needs beyond reading, by (output id, triggering input id); a
#: trigger of None means whatever triggers it. The library checks again when it writes.
CALLBACK_RIGHTS: dict[tuple[str, str | None], str] = {
    (ids.LOG_SAVE_RESULT, ids.LOG_SAVE): "log_test",
    (ids.LOG_CAPTURE_KEY, ids.LOG_CAPTURE_UPLOAD): "log_test",  # kept on the server's disk
    (ids.LOG_CAPTURE_PREVIEW_OUT, None): "log_test",
    (ids.LOG_CAPTURE_SAVE_RESULT, ids.LOG_CAPTURE_SAVE): "log_test",
    (ids.PLAN_STATE, ids.PLAN_COMMIT): "plan",
    (ids.PLAN_DOWNLOAD, None): "export",
    (ids.BOARD_DOWNLOAD, None): "export",
    (ids.TRAIL_VOID_RESULT, None): "void_own",
    (ids.TRAIL_DOWNLOAD, None): "export",
}
#: Pages shown in the navigation only to roles with the right.
PAGE_RIGHTS: dict[str, str] = {"/log": "log_test"}


def install(server: Flask, *, enabled: bool, limits: users.SessionLimits) -> None:
    """Add the guard, the login and logout routes and the security headers to ``server``."""
    server.config[AUTH_KEY] = enabled
    server.config[LIMITS_KEY] = limits
    server.before_request(_guard)
    server.teardown_request(_forget_actor)
    server.after_request(_headers)
    server.add_url_rule("/login", "fleetdb_login", _login, methods=["GET", "POST"])
    server.add_url_rule("/logout", "fleetdb_logout", _logout, methods=["POST"])


def login_enabled() -> bool:
    """Whether this app asks for a login."""
    return bool(current_app.config.get(AUTH_KEY))


def _engine() -> Any:
    from dashboard.data import current_url

    return db.get_engine(current_url())


def _remote() -> str:
    return (request.remote_addr or "unknown")[:64]


def callback_right(body: Any) -> str | None:
    """The right a ``/_dash-update-component`` body needs beyond reading, or None.

    :param body: the JSON the browser posts (``output``, ``changedPropIds``...).
    """
    if not isinstance(body, dict):
        return None
    output = str(body.get("output", ""))
    outputs = {part.rsplit(".", 1)[0] for part in output.strip(".").split("...") if part}
    changed = {str(c).rsplit(".", 1)[0] for c in body.get("changedPropIds") or []}
    for (out, trigger), right in CALLBACK_RIGHTS.items():
        if out in outputs and (trigger is None or trigger in changed):
            return right
    return None


def _same_origin() -> bool:
    """A browser's POST names the page it came from; it must be this server."""
    source = request.headers.get("Origin") or request.headers.get("Referer")
    if not source or source == "null":
        return source is None  # no header: not a browser form; "null": refuse
    return urlparse(source).netloc == request.host


def _refuse(status: int, message: str) -> Response:
    return Response(f'{{"error": "{message}"}}', status=status, mimetype="application/json")


def _guard() -> Response | None:
    remote = _remote()
    if not login_enabled():
        g.fleetdb_actor = access.set_actor(access.Actor(
            name=access.os_user(), origin=f"web:{remote} (no login)"))
        return None
    if request.method == "POST" and not _same_origin():
        return _refuse(403, "this request came from another site")
    if request.path.startswith(PUBLIC_PREFIXES):
        return None
    user = users.session_user(_engine(), request.cookies.get(COOKIE),
                              current_app.config[LIMITS_KEY])
    if user is None:
        if request.path.startswith("/_"):
            return _refuse(401, "not logged in, or the session ended: log in again")
        return redirect(f"/login?next={quote(request.full_path.rstrip('?'), safe='/?=&')}")
    actor = access.Actor(name=user.name, origin=f"web:{remote}", role=user.role)
    g.fleetdb_actor = access.set_actor(actor)
    g.fleetdb_user = user
    if request.path == "/_dash-update-component" and request.method == "POST":
        right = callback_right(request.get_json(silent=True))
        if right is not None and not actor.may(right):
            return _refuse(403, f"{user.name} ({user.role}) may not do this: it needs a role "
                                f"with the right to {access.RIGHTS[right]}")
    return None


def _forget_actor(_exc: BaseException | None) -> None:
    token = g.pop("fleetdb_actor", None)
    if token is not None:
        access.reset_actor(token)


def _headers(response: Response) -> Response:
    response.headers.setdefault("X-Frame-Options", "DENY")
    response.headers.setdefault("X-Content-Type-Options", "nosniff")
    response.headers.setdefault("Referrer-Policy", "same-origin")
    return response


def _safe_next(target: str | None) -> str:
    """Only a path on this server (never ``//elsewhere`` or a full URL)."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target


def _login() -> Response | str:
    if not login_enabled():
        return redirect("/")
    target = _safe_next(request.values.get("next"))
    if request.method == "GET":
        return _login_page(target, None)
    name = request.form.get("name", "")
    opened = users.log_in(_engine(), name, request.form.get("password", ""), _remote())
    if opened is None:
        return Response(_login_page(target, "Wrong name or password, or this user is "
                                            "disabled or locked for a while.", name),
                        status=401, mimetype="text/html")
    token, _user = opened
    response = redirect(target)
    limits: users.SessionLimits = current_app.config[LIMITS_KEY]
    response.set_cookie(COOKIE, token, max_age=int(limits.absolute / timedelta(seconds=1)),
                        httponly=True, samesite="Lax", secure=request.is_secure, path="/")
    return response


def _logout() -> Response:
    users.log_out(_engine(), request.cookies.get(COOKIE))
    response = redirect("/login")
    response.delete_cookie(COOKIE, path="/", httponly=True, samesite="Lax")
    return response


def _login_page(target: str, problem: str | None, name: str = "") -> str:
    message = f'<p class="login-problem" role="alert">{html.escape(problem)}</p>' \
        if problem else ""
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>Log in · fleetdb</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>
body {{ font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; background:
  #f3f5f7; color: #1b2430; display: grid; place-items: center; min-height: 100vh; margin: 0; }}
form {{ background: #fff; padding: 2rem; border: 1px solid #d5dbe1; border-radius: 6px;
  width: 20rem; }}
label {{ display: block; margin: 0.8rem 0 0.2rem; font-weight: 600; }}
input {{ width: 100%; box-sizing: border-box; padding: 0.45rem; font-size: 1rem; }}
button {{ margin-top: 1.2rem; padding: 0.5rem 1.2rem; font-size: 1rem; }}
.login-problem {{ color: #8a1c1c; font-weight: 600; }}
</style></head>
<body><form method="post" action="/login" id="login-form">
<h1>fleetdb</h1>
<p>Log in to read and record your fleet's engine tests.</p>
{message}
<input type="hidden" name="next" value="{html.escape(target)}">
<label for="login-name">Name</label>
<input id="login-name" name="name" autocomplete="username" required autofocus
  value="{html.escape(name)}">
<label for="login-password">Password</label>
<input id="login-password" name="password" type="password" autocomplete="current-password"
  required>
<button type="submit" id="login-submit">Log in</button>
</form></body></html>"""


def current_user_line() -> tuple[str, str] | None:
    """(name, role) of the logged-in user of this request, or None without login."""
    if not has_request_context():  # Dash checks the layout once at start-up
        return None
    user = g.get("fleetdb_user")
    return None if user is None else (user.name, user.role)
