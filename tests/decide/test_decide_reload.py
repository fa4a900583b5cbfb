"""``lenslane watch`` reloads its configuration on SIGHUP, validated first, and warns while the file differs."""
from __future__ import annotations

import json
import signal

from tests.decide.helpers import config_text, ready_order, records
from tests.system.driver import FAST_WATCH, Watch, drop, make_lab, wait_until


def published_config(lab, order_id):
    wait_until(lambda: records(lab, "published", order_id), f"{order_id} to be published")
    return records(lab, "published", order_id)[0]["config_sha256"]


def test_sighup_reloads_a_valid_config_and_refuses_a_bad_one_keeping_the_old(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    try:
        drop(lab, "A-1.json", json.dumps(ready_order("A-1")).encode())
        first = published_config(lab, "A-1")

        # A misspelt stage parameter: refused with its key path, the configuration in force kept.
        (lab / "lenslane.toml").write_text(config_text("[stages.safety]\nhigh_power_dd = 6.0\n"))
        watch.process.send_signal(signal.SIGHUP)
        refused = watch.wait_for("config refused")
        assert "stages.safety.high_power_dd" in refused["error"]
        drop(lab, "A-2.json", json.dumps(ready_order("A-2")).encode())
        assert published_config(lab, "A-2") == first
        warning = watch.wait_for("config differs")
        assert "differs from the one in force" in warning["message"]

        # Corrected: reloaded; the next order runs with it.
        (lab / "lenslane.toml").write_text(config_text("[stages.safety]\nhigh_power_d = 6.0\n"))
        watch.process.send_signal(signal.SIGHUP)
        reloaded = watch.wait_for("config reloaded")
        assert reloaded["old_config_sha256"] == first and reloaded["config_sha256"] != first
        drop(lab, "A-3.json", json.dumps(ready_order("A-3")).encode())
        assert published_config(lab, "A-3") == reloaded["config_sha256"]
    finally:
        assert watch.stop() == 0
    assert watch.process.returncode == 0


def test_a_file_edited_without_sighup_is_warned_about_and_not_used(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    try:
        (lab / "lenslane.toml").write_text(config_text("[engine]\ncylinder_form = \"plus\"\n"))
        warning = watch.wait_for("config differs")
        assert "edited since the configuration in force was loaded" in warning["message"]
        drop(lab, "B-1.json", json.dumps(ready_order("B-1")).encode())
        wait_until(lambda: records(lab, "published", "B-1"), "B-1 to be published")
        result = json.loads((lab / "outbox" / "B-1.json").read_bytes())
        assert result["lenses"]["right"]["rx"]["cylinder"] < 0  # still the minus form in force
        assert not watch.events("config reloaded")
    finally:
        assert watch.stop() == 0


def test_an_observer_rebuilt_after_a_reload_logs_the_settings_in_force(tmp_path):
    lab = make_lab(tmp_path / "lab")
    watch = Watch(lab)
    try:
        assert watch.events("observer")[0]["rescan_seconds"] == FAST_WATCH["rescan_seconds"]
        (lab / "lenslane.toml").write_text(config_text(rescan_seconds=2.5, observer="polling"))
        watch.process.send_signal(signal.SIGHUP)
        watch.wait_for("observer rebuilt")
        (_, rebuilt) = watch.events("observer")
        assert rebuilt["kind"] == "polling" and rebuilt["rescan_seconds"] == 2.5
    finally:
        assert watch.stop() == 0
