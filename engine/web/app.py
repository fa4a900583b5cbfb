"""The server of ``lenslane serve``: the queue, the order pages, the search and the decision form.

Built on Flask (routing, requests, responses) with the Jinja templates of
:mod:`lenslane.web.page`, served by waitress. It reads the lab folder and
writes nothing itself: a decision goes through :func:`lenslane.decide.decide`,
the one mechanism that applies decisions (it keeps the lab's single writer and
its crash promise); the queue comes from :func:`lenslane.decide.queue`. The
server holds no lock.

Safety:

- every order id in a URL is checked against the contract's pattern before it
  is used, and every file read is resolved inside the lab folder;
- everything shown is escaped by the templates (autoescape) and the SVG
  pictures escape their own text;
- the decision form carries a token (HMAC of the order id under a secret made
  when the server starts) and a POST from another origin is refused;
- on a loopback address the Host header must name the loopback (no DNS
  rebinding); on any other address every request needs the access token of
  ``LENSLANE_SERVE_TOKEN`` (see :mod:`lenslane.web.serve`).
"""
from __future__ import annotations

import hashlib
import hmac
import secrets
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from flask import Flask, abort, redirect, request
from werkzeug.exceptions import HTTPException

from lenslane import decide
from lenslane.decide.model import ACTION_MEANINGS, QueueItem
from lenslane.web.lab_view import counts_today, search
from lenslane.web.page import order_page_data, templates, valid_order_id

#: The cookie that carries the access token once a browser has shown it.
TOKEN_COOKIE = "lenslane_token"
LOOPBACK_NAMES = ("127.0.0.1", "localhost", "::1")
#: What the error pages this server raises itself say (any other error says what HTTP calls it).
_ERROR_TEXTS = {
    403: ("Refused", "The form did not come from this page (its token is missing or wrong); nothing was recorded. "
                     "Open the order page again and decide there."),
    404: ("Not found", "There is no such page."),
    421: ("Refused", "This server answers only to its loopback address (127.0.0.1, localhost or [::1])."),
}
_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
                               "form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",  # "no-referrer" would make a browser send "Origin: null" with the form
    "Cache-Control": "no-store",
}


def _awaiting(item: QueueItem) -> dict[str, Any]:
    """What the page says about one queue item: the item, and each action that fits it with what it does."""
    return {**item.to_dict(), "actions": [(action, ACTION_MEANINGS[action]) for action in item.actions]}


def _host_name(host: str) -> str:
    """The name in a Host header, without its port (``[::1]:8080`` → ``::1``)."""
    if host.startswith("["):
        return host[1:host.find("]")]
    return host.split(":")[0]


def create_app(lab_root: Path, token: str | None = None, loopback: bool = True) -> Flask:
    """The web application for one lab.

    ``token``: when set, every request must carry it (cookie, ``Authorization:
    Bearer`` header, or once ``?token=`` which sets the cookie); ``loopback``:
    the server listens on a loopback address, so requests must name it in Host.
    """
    lab_root = Path(lab_root).resolve()
    app = Flask(__name__)
    app.config["MAX_CONTENT_LENGTH"] = 64 * 1024
    secret = secrets.token_bytes(32)

    def csrf_for(order_id: str) -> str:
        return hmac.new(secret, f"decide:{order_id}".encode(), hashlib.sha256).hexdigest()

    def page(name: str, status: int = 200, **context: Any):
        html = templates.get_template(name).render(standalone=False, lab=str(lab_root), **context)
        return html, status, {"Content-Type": "text/html; charset=utf-8"}

    @app.before_request
    def guard():
        if loopback and _host_name(request.host) not in LOOPBACK_NAMES:
            abort(421)  # a name that is not the loopback: refused (DNS rebinding)
        if token is None:
            return None
        given = (request.cookies.get(TOKEN_COOKIE, ""), request.args.get("token", ""),
                 request.headers.get("Authorization", "").removeprefix("Bearer "))
        if not any(hmac.compare_digest(candidate.encode(), token.encode()) for candidate in given):
            return page("message.html", 401, title="Access token needed",
                        text="This lab's page needs its access token: open it once as /?token=… "
                             "(the value of LENSLANE_SERVE_TOKEN where the server runs).")
        if request.args.get("token"):
            response = redirect(request.path)
            response.set_cookie(TOKEN_COOKIE, token, httponly=True, samesite="Strict")
            return response
        return None

    @app.after_request
    def headers(response):
        response.headers.update(_HEADERS)
        return response

    @app.errorhandler(HTTPException)
    def error_page(error: HTTPException):
        """Every error is a page of the lab's own, with the caution like any other."""
        title, text = _ERROR_TEXTS.get(error.code, (error.name, error.description))
        return page("message.html", error.code or 500, title=title, text=text)

    @app.get("/")
    def queue_page():
        items = [_awaiting(item) for item in decide.queue(lab_root)]
        return page("queue.html", items=items, counts=counts_today(lab_root))

    @app.get("/search")
    def search_page():
        query = request.args.get("q", "")[:200]
        return page("search.html", query=query, hits=search(lab_root, query) if query.strip() else None)

    def awaiting_decision(order_id: str) -> dict[str, Any] | None:
        return next((_awaiting(item) for item in decide.queue(lab_root) if item.order_id == order_id), None)

    @app.get("/orders/<order_id>")
    def order_page(order_id: str):
        if not valid_order_id(order_id):
            abort(404)
        data = order_page_data(lab_root, order_id)
        done = request.args.get("done")
        message = f"Decision recorded: {done}." if done in ACTION_MEANINGS else None
        return page("order.html", 200 if data["found"] else 404, page=data, awaiting=awaiting_decision(order_id),
                    csrf=csrf_for(order_id), message=message)

    @app.post("/orders/<order_id>/decide")
    def decide_order(order_id: str):
        if not valid_order_id(order_id):
            abort(404)
        origin = request.headers.get("Origin")
        if origin and urlsplit(origin).netloc != request.host:
            abort(403)
        if not hmac.compare_digest(request.form.get("csrf", "").encode(), csrf_for(order_id).encode()):
            abort(403)
        action, by, note = request.form.get("action", ""), request.form.get("by", "").strip(), request.form.get("note", "").strip()
        error = None
        awaiting = awaiting_decision(order_id)
        if not by or not note:
            error = "A decision needs the name of the person who makes it and a note of why; nothing was recorded."
        elif awaiting is None:
            error = f"Order {order_id} is not awaiting a decision; nothing was recorded."
        elif action not in {a for a, _ in awaiting["actions"]}:
            error = f"Choose one of: {', '.join(a for a, _ in awaiting['actions'])}; nothing was recorded."
        else:
            try:
                decide.decide(lab_root, order_id, action, by, note)
            except decide.DecisionError as exc:
                error = f"Not recorded: {exc.message}"
            else:
                return redirect(f"/orders/{order_id}?done={action}", 303)
        data = order_page_data(lab_root, order_id)
        return page("order.html", 409 if awaiting is None else 400, page=data, awaiting=awaiting,
                    csrf=csrf_for(order_id), error=error)

    return app
