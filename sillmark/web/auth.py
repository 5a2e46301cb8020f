"""Who may do what: the operator's access secrets, sign-in, and one check per request.

With no secret configured the app is open (the default on 127.0.0.1). Once the
operator sets ``EDITOR_SECRET`` (and optionally ``VIEWER_SECRET``), in the data
folder's ``config.py`` or as ``$SILLMARK_EDITOR_SECRET`` /
``$SILLMARK_VIEWER_SECRET``, every request needs a sign-in at ``/signin``:

- a **viewer** (viewer secret) may read: pages, numbers, tiles, downloads
  (GET, HEAD, OPTIONS);
- an **editor** (editor secret) may also change things: upload, settings,
  re-run, barrier planning, assets: every other method.

The role is kept in Flask's signed session cookie together with a fingerprint
of the secret it was granted with, so changing a secret signs out everyone who
used it, and a random sign-in id that the server keeps in SQLite (table
``signins``), so signing out ends the sign-in for every copy of the cookie. :func:`check_access` runs before every view (registered by
:func:`init_app`), so a new route cannot forget it. Secrets are compared with
:func:`secrets.compare_digest`; after each wrong attempt from an address its
next try must wait longer, and one that comes too soon is refused at once
(429 with Retry-After) rather than held in a sleeping thread. :func:`serving_refusal` is what ``sillmark serve``
asks before listening beyond this machine.
"""

from __future__ import annotations

import collections
import datetime as _dt
import hashlib
import hmac
import ipaddress
import math
import secrets
import sqlite3
import threading
import time
from urllib.parse import urlsplit

from flask import (
    Blueprint,
    Flask,
    current_app,
    jsonify,
    redirect,
    render_template,
    request,
    session,
    url_for,
)

from sillmark.web import _error, db, get_db, wants_json

bp = Blueprint("auth", __name__)

VIEWER = "viewer"
EDITOR = "editor"
#: Methods a viewer may use: the ones that change nothing.
READ_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
#: Endpoints anyone may reach: signing in and out, and the static files the page needs.
OPEN_ENDPOINTS = frozenset({"auth.signin", "auth.signin_post", "auth.signout", "static"})
#: Shortest secret accepted; shorter ones are refused when the app starts.
MIN_SECRET_LENGTH = 12
#: Host names that mean this machine only.
LOOPBACK_NAMES = frozenset({"localhost", "localhost.localdomain", "ip6-localhost"})


class AccessNotConfigured(Exception):
    """The access secrets are missing or unusable for the way the server is asked to run."""


# --------------------------------------------------------------------------- configuration


def secrets_in(config) -> dict[str, str]:
    """The configured secrets by role ({} when access control is off)."""
    found = {}
    for role, key in ((EDITOR, "EDITOR_SECRET"), (VIEWER, "VIEWER_SECRET")):
        value = config.get(key)
        if value is not None and str(value) != "":
            found[role] = str(value)
    return found


def check_secrets(config) -> None:
    """Refuse secrets that are too short, identical, or a viewer secret without an editor one."""
    found = secrets_in(config)
    if VIEWER in found and EDITOR not in found:
        raise AccessNotConfigured(
            "VIEWER_SECRET is set but EDITOR_SECRET is not; set an editor secret too "
            "(SILLMARK_EDITOR_SECRET), or no one could change anything"
        )
    for role, value in found.items():
        if len(value) < MIN_SECRET_LENGTH:
            raise AccessNotConfigured(
                f"the {role} secret is shorter than {MIN_SECRET_LENGTH} characters; choose a "
                "longer one (e.g. python -c \"import secrets; print(secrets.token_urlsafe(18))\")"
            )
    if VIEWER in found and secrets.compare_digest(found[VIEWER].encode(), found[EDITOR].encode()):
        raise AccessNotConfigured("the viewer and editor secrets are the same; choose two different ones")


def is_loopback(host: str) -> bool:
    """True for an address or name that only this machine can reach (127.0.0.0/8, ::1, localhost)."""
    text = str(host).strip().strip("[]").lower()
    if text in LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(text).is_loopback
    except ValueError:
        return False


def serving_refusal(host: str, config) -> str | None:
    """Why the server must not listen on ``host`` with ``config``, or None if it may.

    Any host other than a loopback address needs an editor secret set by the
    operator; secrets that are set must be usable wherever the server listens.
    """
    try:
        check_secrets(config)
    except AccessNotConfigured as exc:
        return str(exc)
    if not is_loopback(host) and EDITOR not in secrets_in(config):
        return (
            f"listening on {host} lets other machines reach Sillmark, so it needs an access "
            "secret: set SILLMARK_EDITOR_SECRET (and SILLMARK_VIEWER_SECRET for read-only "
            "viewers) in the environment, or EDITOR_SECRET / VIEWER_SECRET in the data "
            "folder's config.py; or keep --host 127.0.0.1"
        )
    return None


def enabled() -> bool:
    return bool(secrets_in(current_app.config))


def _fingerprint(role: str, secret: str) -> str:
    """Ties a session's role to the secret it was granted with (a changed secret signs it out)."""
    key = str(current_app.config["SECRET_KEY"]).encode()
    return hmac.new(key, f"{role}\0{secret}".encode(), hashlib.sha256).hexdigest()[:32]


def current_role() -> str | None:
    """The signed-in role of this request: ``editor``, ``viewer``, or None (signed out).

    With access control off everyone is an editor.
    """
    found = secrets_in(current_app.config)
    if not found:
        return EDITOR
    role = session.get("role")
    if role not in found:
        return None
    mark = session.get("access")
    if not isinstance(mark, str) or not hmac.compare_digest(mark, _fingerprint(role, found[role])):
        return None
    if not _signin_alive(session.get("sid"), role):
        return None
    return role


# --------------------------------------------------------------------------- sign-ins kept on the server
#
# The cookie holds only a random sign-in id; the server keeps which ids are
# signed in (table ``signins``). Signing out deletes the id, so a copy of the
# cookie is worth nothing afterwards; ids older than SIGNIN_LIFETIME are refused.

SIGNINS_TABLE = ("CREATE TABLE IF NOT EXISTS signins (sid TEXT PRIMARY KEY, role TEXT NOT NULL, "
                 "created REAL NOT NULL)")


def _lifetime() -> float:
    return float(current_app.config["SIGNIN_LIFETIME"])


def _remember_signin(role: str) -> str:
    """Record a new sign-in of ``role`` and return its id (old ones are swept)."""

    sid = secrets.token_urlsafe(24)
    now = time.time()
    with db.transaction(get_db()) as conn:
        conn.execute("DELETE FROM signins WHERE created < ?", (now - _lifetime(),))
        conn.execute("INSERT INTO signins(sid, role, created) VALUES (?, ?, ?)", (sid, role, now))
    return sid


def _signin_alive(sid, role: str) -> bool:
    """Whether ``sid`` is a sign-in of ``role`` the server still holds and that has not expired."""

    if not isinstance(sid, str) or not sid:
        return False
    row = get_db().execute("SELECT role, created FROM signins WHERE sid = ?", (sid,)).fetchone()
    return row is not None and row["role"] == role and row["created"] > time.time() - _lifetime()


def _forget_signin(sid) -> None:

    if isinstance(sid, str) and sid:
        with db.transaction(get_db()) as conn:
            conn.execute("DELETE FROM signins WHERE sid = ?", (sid,))


# --------------------------------------------------------------------------- the check


def check_access():
    """Before every view: signed-out visitors to the sign-in page, viewers kept to reading."""
    if not enabled() or request.endpoint in OPEN_ENDPOINTS:
        return None
    role = current_role()
    if role is None:

        if request.method in READ_METHODS and not wants_json():
            return redirect(url_for("auth.signin", next=request.full_path.rstrip("?")), code=303)
        return _refuse(401, "sign in first: this Sillmark server needs an access secret "
                            f"({url_for('auth.signin')})")
    if role == VIEWER and request.method not in READ_METHODS:
        return _refuse(403, "you are signed in as a viewer, who may look but not change "
                            "anything; sign in with the editor secret to do this")
    return None


def _refuse(status: int, message: str):
    response = _error(status, message)
    if isinstance(response, tuple):
        response = current_app.make_response(response)
    if status == 401:
        response.headers["WWW-Authenticate"] = 'Sillmark realm="sign in at /signin"'
    return response


# --------------------------------------------------------------------------- slowing down guesses


class _Attempts:
    """Recent wrong sign-ins per client address, and until when each address must wait.

    Nothing sleeps: a try from an address that is still waiting is refused at
    once (429 with Retry-After), so a burst of guesses holds no request thread.
    """

    WINDOW = 15 * 60.0

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._wrong: dict[str, collections.deque] = {}
        self._until: dict[str, float] = {}

    def wait_left(self, who: str) -> float:
        """Seconds ``who`` must still wait before the next try (0 when it may try now)."""
        with self._lock:
            return max(0.0, self._until.get(who, 0.0) - time.monotonic())

    def wrong(self, who: str, pause_for) -> float:
        """Record a wrong try; ``pause_for(count)`` gives the wait before the next. Returns it."""
        with self._lock:
            q = self._prune(who)
            q.append(time.monotonic())
            pause = float(pause_for(len(q)))
            self._until[who] = time.monotonic() + pause
            if len(self._wrong) > 10_000:  # keep memory bounded under a flood of addresses
                for key in list(self._wrong)[:5_000]:
                    self._wrong.pop(key, None)
                    self._until.pop(key, None)
            return pause

    def forget(self, who: str) -> None:
        with self._lock:
            self._wrong.pop(who, None)
            self._until.pop(who, None)

    def _prune(self, who: str) -> collections.deque:
        q = self._wrong.setdefault(who, collections.deque())
        cutoff = time.monotonic() - self.WINDOW
        while q and q[0] < cutoff:
            q.popleft()
        return q


def _pause_after_wrong(count: int) -> float:
    base = float(current_app.config["SIGNIN_DELAY"])
    return min(base * count, float(current_app.config["SIGNIN_MAX_DELAY"]))


def _too_soon(wait: float):
    """429 for a try that comes before the address's wait is over."""
    seconds = max(1, math.ceil(wait))
    response = _refuse(429, f"too many wrong secrets from your address; wait {seconds} s and try again")
    response.headers["Retry-After"] = str(seconds)
    response.headers["Cache-Control"] = "no-store"
    return response


# --------------------------------------------------------------------------- sign-in views


def _safe_next(target: str | None) -> str:
    """Where to go after signing in: a path on this server only (no other host, no scheme)."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return url_for("pages.index")
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in target):  # no header splitting, no odd paths
        return url_for("pages.index")
    parts = urlsplit(target)
    if parts.scheme or parts.netloc:
        return url_for("pages.index")
    return target


def _signin_page(status: int = 200, message: str | None = None):
    response = current_app.make_response((render_template(
        "signin.html", message=message, next_url=_safe_next(request.values.get("next")),
        viewers=VIEWER in secrets_in(current_app.config), role=current_role() if enabled() else None,
        open_access=not enabled(),
    ), status))
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.get("/signin")
def signin():
    """The sign-in form (with access control off it says so)."""
    return _signin_page()


@bp.post("/signin")
def signin_post():
    """Check the secret sent; on a match keep the role in a fresh session."""
    found = secrets_in(current_app.config)
    if not found:
        return _signin_page(message="this server has no access secrets: everyone may use it")
    who = request.remote_addr or "?"
    attempts = current_app.extensions["sillmark_signin"]
    wait = attempts.wait_left(who)
    if wait > 0:
        return _too_soon(wait)
    sent = str(request.form.get("secret", "")).encode()
    granted = None
    for role in (EDITOR, VIEWER):
        if role in found and secrets.compare_digest(sent, found[role].encode()):
            granted = role
    if granted is None:
        attempts.wrong(who, _pause_after_wrong)
        if request.accept_mimetypes.best == "application/json":
            return _refuse(401, "that secret is not right")
        response = _signin_page(401, "That secret is not right. After each wrong try the next "
                                           "one must wait longer.")
        return response
    attempts.forget(who)
    target = _safe_next(request.form.get("next"))
    session.clear()  # a new session: nothing from before the sign-in is carried over
    session.permanent = True
    session["role"] = granted
    session["access"] = _fingerprint(granted, found[granted])
    session["sid"] = _remember_signin(granted)
    if request.accept_mimetypes.best == "application/json":
        return jsonify({"role": granted, "next": target})
    return redirect(target, code=303)


@bp.post("/signout")
def signout():
    _forget_signin(session.get("sid"))
    session.clear()
    return redirect(url_for("auth.signin"), code=303)


#: Endpoints whose answers carry sign-in state: never stored by any cache.
NO_STORE_ENDPOINTS = frozenset({"auth.signin", "auth.signin_post", "auth.signout"})


def private_caching(response):
    """With access secrets set, keep every answer out of shared caches (proxies).

    Sign-in answers get ``no-store``; ``public`` becomes ``private``; an answer
    that says nothing gets ``private, no-cache``. Static files (the same for
    everyone) keep their own policy. ``Vary: Cookie`` is added, since the
    answer depends on who asks.
    """
    if not enabled() or request.endpoint == "static":
        return response
    if request.endpoint in NO_STORE_ENDPOINTS:
        response.headers["Cache-Control"] = "no-store"
    else:
        response.headers["Cache-Control"] = _private(response.headers.get("Cache-Control"))
    response.vary.add("Cookie")
    return response


def _private(policy: str | None) -> str:
    """``policy`` with shared caching ruled out."""
    parts = [p.strip() for p in (policy or "").split(",") if p.strip()]
    parts = [p for p in parts if p.lower() not in ("public", "private")]
    if not any(p.lower() in ("no-store", "no-cache") or p.lower().startswith("max-age") for p in parts):
        parts.append("no-cache")
    return ", ".join(["private", *parts])


def _create_signins_table(db_path) -> None:


    conn = db.connect(db_path)
    try:
        conn.execute(SIGNINS_TABLE)
    except sqlite3.OperationalError:  # a read-only data folder: reading still works, signing in will say why not
        pass
    finally:
        conn.close()


def init_app(app: Flask) -> None:
    """Check the configured secrets, register the sign-in pages and the per-request check.

    Call before any other ``before_request`` hook is registered, so an unsigned
    request is answered 401 before its form token is looked at.
    """

    check_secrets(app.config)
    _create_signins_table(app.extensions["sillmark"].db_path)
    app.config["PERMANENT_SESSION_LIFETIME"] = _dt.timedelta(seconds=float(app.config["SIGNIN_LIFETIME"]))
    app.extensions["sillmark_signin"] = _Attempts()
    app.register_blueprint(bp)
    app.before_request(check_access)
    app.after_request(private_caching)

    @app.context_processor
    def role_for_templates():
        return {"access_role": current_role() if enabled() else None}
