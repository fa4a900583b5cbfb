"""The order page, ``explain --html`` and the server's pages, their safety, through Flask's test client."""
from __future__ import annotations

import json
import os
import re

import pytest

from lenslane.cli import main
from lenslane.vocabulary import CAUTION
from lenslane.web.app import create_app
from lenslane.web.page import inside_lab, render_order_page
from lenslane.web.serve import MIN_TOKEN_LENGTH, TOKEN_VARIABLE, ServeRefused, access_token, is_loopback

MINUS = "\u2212"  # Source: Unicode U+2212 MINUS SIGN, the sign printed in the trade's notation


def test_explain_html_writes_one_self_contained_page(sample_lab, tmp_path, capsys):
    lab, results = sample_lab
    target = tmp_path / "DP-1000.html"
    assert main(["explain", str(lab.root), "DP-1000", "--html", str(target)]) == 0
    html = target.read_text()
    # Self-contained: no script, no stylesheet link, no image or frame fetched from anywhere.
    assert not re.search(r"<(script|link|iframe|img)\b", html)
    assert not re.search(r"""\b(src|href)=["'](?!#)""", html)
    assert html.count(CAUTION) >= 2  # at the top and at the foot
    # The prescription as the order writes it (right: −4.25 −1.25 × 170, add +2.25; prism 1Δ in + 0.5Δ up).
    assert f"{MINUS}4.25 {MINUS}1.25 × 170 add +2.25" in html
    # The lens, frame and fit as the order gives them.
    assert "A 52.0 × B 36.0 mm, bridge 18.0 mm, full rim" in html
    assert "right PD 31.5 mm, height 20.0 mm; left PD 31.0 mm, height 20.0 mm; vertex 13.5 mm" in html
    # Each stage's change, before and after, as published in the result.
    surfacing = results["DP-1000"]["lenses"]["right"]["surfacing"]
    assert f"{MINUS}{abs(surfacing['sphere']):.2f} {MINUS}{abs(surfacing['cylinder']):.2f} × {surfacing['axis']}" in html
    assert html.count("<svg") >= 6  # outline, thickness, sections per eye at least
    geometry = results["DP-1000"]["lenses"]["right"]["geometry"]
    assert f"thinnest edge {geometry['edge_min_mm']:.1f} mm" in html
    # Flags grouped by level, with what to decide.
    assert re.search(r'<section class="warning">\s*<h3><span class="level">warning</span>', html)
    assert "check before production; the order is not held" in html
    # The geometry's assumptions once, not in every line.
    assert html.count("spherical front and toric back, exact sags") == 1


def test_explain_html_of_an_unknown_order_writes_nothing(sample_lab, tmp_path, capsys):
    lab, _ = sample_lab
    target = tmp_path / "none.html"
    assert main(["explain", str(lab.root), "NOPE-1", "--html", str(target)]) == 1
    assert not target.exists()


def test_a_rejected_order_tells_its_reasons(sample_lab):
    lab, _ = sample_lab
    html = render_order_page(lab.root, "rejected-unknown-material")
    assert "Rejected, not made" in html and "lens.material" in html and "crystal-2.0" in html


def test_a_changed_result_file_is_not_drawn_from(sample_lab):
    lab, _ = sample_lab
    published = lab.root / "outbox" / "DP-1001.json"
    data = json.loads(published.read_text())
    data["order"]["frame"]["box_width_mm"] = 80.0
    published.write_text(json.dumps(data))
    html = render_order_page(lab.root, "DP-1001")
    assert "CHANGED since it was published" in html
    # The archived input still has the sha256 the log recorded: the lens is drawn from it, not the edited file.
    assert "the input as received" in html and "A 80.0 mm" not in html


def test_nothing_outside_the_lab_is_read(tmp_path):
    root = tmp_path / "lab"
    (root / "outbox").mkdir(parents=True)
    (tmp_path / "secret.json").write_text("{}")
    os.symlink(tmp_path / "secret.json", root / "outbox" / "link.json")
    assert inside_lab(root, "outbox/x.json") == (root / "outbox" / "x.json").resolve()
    assert inside_lab(root, "../secret.json") is None
    assert inside_lab(root, "/etc/passwd") is None
    assert inside_lab(root, "outbox/link.json") is None  # a link out of the lab is not followed


@pytest.fixture
def client(sample_lab):
    lab, results = sample_lab
    return create_app(lab.root).test_client(), lab, results


def test_the_queue_page_counts_todays_outcomes_and_carries_the_caution(client):
    web, lab, results = client
    page = web.get("/").get_data(as_text=True)
    # What the lab folder holds: the results published, those in review, the refused inputs beside their reasons.
    published = len(list((lab.root / "outbox").glob("*.json")))
    review = len(list((lab.root / "review").glob("*.json")))
    rejected = len(list((lab.root / "rejected").glob("*.errors.json")))
    assert published >= 2 and review == 1
    assert f'<strong class="count-published">{published}</strong> published' in page
    assert f'<strong class="count-review">{review}</strong> to review' in page
    assert f'<strong class="count-rejected">{rejected}</strong> rejected' in page
    assert CAUTION in page


def test_search_finds_by_order_id_and_by_file_name(client):
    web, _, _ = client
    by_id = web.get("/search?q=dp-1000").get_data(as_text=True)
    assert 'href="/orders/DP-1000"' in by_id and "progressive-minus-tilt-vertex-prism.json" in by_id
    by_file = web.get("/search?q=unknown-material").get_data(as_text=True)
    assert 'href="/orders/rejected-unknown-material"' in by_file and "rejected" in by_file
    assert "Nothing in the audit log matches" in web.get("/search?q=zzz").get_data(as_text=True)


def test_names_are_escaped_everywhere(client):
    web, lab, _ = client
    hostile = '<img src=x onerror=alert(1)>.json'
    (lab.inbox / hostile).write_text('{"format": "lens-order/1"}')
    lab.drain()
    page = web.get("/search?q=onerror").get_data(as_text=True)
    assert "&lt;img src=x onerror=alert(1)&gt;.json" in page and "<img src=x" not in page
    page = web.get("/search?q=%3Cscript%3Ealert(1)%3C/script%3E").get_data(as_text=True)
    assert "<script>alert(1)</script>" not in page and "&lt;script&gt;" in page
    assert web.get("/orders/%3Cimg%20src=x%3E").status_code == 404


def test_an_order_page_and_an_unknown_order(client):
    web, _, _ = client
    response = web.get("/orders/DP-1000")
    assert response.status_code == 200
    page = response.get_data(as_text=True)
    assert "<h1>Order DP-1000" in page and CAUTION in page
    assert "default-src 'none'" in response.headers["Content-Security-Policy"]
    assert web.get("/orders/NOPE-1").status_code == 404
    assert web.get("/orders/..%2F..%2Fetc%2Fpasswd").status_code == 404


def test_every_error_page_carries_the_caution(client):
    web, _, _ = client
    for response, status in ((web.get("/orders/NOPE-1"), 404), (web.get("/no/such/page"), 404),
                             (web.get("/orders/DP-1000/decide"), 405),
                             (web.post("/orders/DP-1000/decide", data={"note": "x" * 70_000}), 413),
                             (web.post("/orders/DP-1000/decide", data={}), 403),
                             (web.get("/", headers={"Host": "lab.example"}), 421)):
        assert response.status_code == status
        assert CAUTION in response.get_data(as_text=True), status


def test_loopback_server_answers_only_to_loopback_names(client):
    web, _, _ = client
    assert web.get("/", headers={"Host": "127.0.0.1:8470"}).status_code == 200
    assert web.get("/", headers={"Host": "[::1]:8470"}).status_code == 200
    assert web.get("/", headers={"Host": "lab.example:8470"}).status_code == 421


def test_a_token_server_wants_the_token(sample_lab):
    lab, _ = sample_lab
    token = "t" * MIN_TOKEN_LENGTH
    web = create_app(lab.root, token=token, loopback=False).test_client()
    assert web.get("/", headers={"Host": "lab.example"}).status_code == 401
    assert web.get("/", headers={"Host": "lab.example", "Authorization": "Bearer wrong"}).status_code == 401
    assert web.get("/", headers={"Host": "lab.example", "Authorization": f"Bearer {token}"}).status_code == 200
    first = web.get(f"/?token={token}", headers={"Host": "lab.example"})
    assert first.status_code == 302 and first.headers["Location"] == "/"
    assert "HttpOnly" in first.headers["Set-Cookie"] and "SameSite=Strict" in first.headers["Set-Cookie"]
    assert web.get("/", headers={"Host": "lab.example"}).status_code == 200  # the cookie now carries it
    web.set_cookie("lenslane_token", "stale", domain="localhost")
    assert web.get(f"/?token={token}", headers={"Host": "lab.example"}).status_code == 302  # a stale cookie is replaced


def test_serving_elsewhere_than_loopback_refuses_without_a_token(sample_lab, capsys, monkeypatch):
    lab, _ = sample_lab
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost") and is_loopback("127.3.2.1")
    assert not is_loopback("0.0.0.0") and not is_loopback("192.0.2.1")  # Source: RFC 5737 documentation address
    assert access_token("127.0.0.1", {}) is None
    with pytest.raises(ServeRefused):
        access_token("0.0.0.0", {TOKEN_VARIABLE: "short"})
    assert access_token("0.0.0.0", {TOKEN_VARIABLE: "x" * MIN_TOKEN_LENGTH}) == "x" * MIN_TOKEN_LENGTH
    monkeypatch.delenv(TOKEN_VARIABLE, raising=False)
    assert main(["serve", str(lab.root), "--host", "0.0.0.0", "--port", "0"]) == 2
    assert TOKEN_VARIABLE in capsys.readouterr().err


def test_a_form_without_its_token_or_from_elsewhere_records_nothing(client):
    web, lab, _ = client
    before = (lab.root / "audit.jsonl").read_bytes()
    assert web.post("/orders/DP-1011/decide", data={"action": "approve", "by": "T-1"}).status_code == 403
    page = web.get("/orders/DP-1011").get_data(as_text=True)
    csrf = re.search(r'name="csrf" value="([0-9a-f]+)"', page).group(1)  # DP-1011 awaits a decision
    response = web.post("/orders/DP-1011/decide", data={"action": "approve", "by": "T-1", "csrf": csrf},
                        headers={"Origin": "http://elsewhere.example"})
    assert response.status_code == 403
    assert (lab.root / "audit.jsonl").read_bytes() == before


def test_a_decision_needs_a_name_and_goes_only_through_the_decision_mechanism(client):
    web, lab, _ = client
    page = web.get("/orders/DP-1011").get_data(as_text=True)
    csrf = re.search(r'name="csrf" value="([0-9a-f]+)"', page).group(1)
    before = (lab.root / "audit.jsonl").read_bytes()
    nameless = web.post("/orders/DP-1011/decide", data={"action": "approve", "by": "  ", "note": "ok", "csrf": csrf})
    assert nameless.status_code == 400 and "needs the name" in nameless.get_data(as_text=True)
    wrong = web.post("/orders/DP-1011/decide", data={"action": "replace", "by": "T-7", "note": "ok", "csrf": csrf})
    assert wrong.status_code == 400 and "Choose one of: approve, refuse" in wrong.get_data(as_text=True)
    assert (lab.root / "audit.jsonl").read_bytes() == before
    done = web.post("/orders/DP-1011/decide", data={"action": "refuse", "by": "T-7", "note": "Fit to be re-measured",
                                                   "csrf": csrf})
    assert done.status_code == 303 and done.headers["Location"] == "/orders/DP-1011?done=refuse"
    assert not (lab.root / "review" / "DP-1011.json").exists()
    again = web.post("/orders/DP-1011/decide", data={"action": "approve", "by": "T-8", "note": "ok", "csrf": csrf})
    assert again.status_code == 409 and "not awaiting a decision" in again.get_data(as_text=True)
    story = web.get("/orders/DP-1011").get_data(as_text=True)
    assert "<strong>refuse</strong> by <strong>T-7</strong>" in story and "Fit to be re-measured" in story
    assert '<h1>Order DP-1011 <span class="status decided">refused</span>' in story


def test_the_lens_is_drawn_with_the_configuration_in_force_when_it_was_made(sample_lab):
    # DP-1001 gives neither outline nor ED: its outline is the lab's superellipse, exponent 4 when it was made.
    # The lab changes the exponent afterwards; the page still draws (and says) the outline the lens was made for.
    from lenslane.config import load_config

    lab, _ = sample_lab
    assert "exponent 4" in render_order_page(lab.root, "DP-1001")
    config = lab.root / "lenslane.toml"
    text = config.read_text()
    assert "# outline_exponent_without_ed = 4.0" in text  # the template's line, under [stages.geometry]
    config.write_text(text.replace("# outline_exponent_without_ed = 4.0", "outline_exponent_without_ed = 2.0"))
    assert load_config(lab.root).stages["geometry"]["outline_exponent_without_ed"] == 2.0
    html = render_order_page(lab.root, "DP-1001")
    assert "exponent 4" in html and "exponent 2" not in html
