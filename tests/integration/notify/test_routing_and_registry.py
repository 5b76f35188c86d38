"""Routing by unit, the escalation route, the channel table, and the log channel."""

import json
import logging

import pytest

from adapters.notify import CHANNEL_TYPES, Channel, ChannelConfigError, build_channel, route
from monitor.engine.model import ADVISORY, Location
from tests.integration.notify.conftest import make_notification

ROUTES = {"ICU-North": ["icu-north-hook", "icu-north-mail"], "Ward-5B": ["ward-5b-mail"]}
DEFAULT = ["house-log"]
ESCALATION = ["outreach-pager", "icu-north-mail"]


def test_route_picks_the_unit_s_channels() -> None:
    n = make_notification(location=Location(unit="Ward-5B", room="12", bed="A"))
    assert route(n, ROUTES, DEFAULT, ESCALATION) == ["ward-5b-mail"]


def test_route_matches_the_unit_regardless_of_case_and_spaces() -> None:
    n = make_notification(location=Location(unit=" icu-north "))
    assert route(n, ROUTES, DEFAULT, ESCALATION) == ["icu-north-hook", "icu-north-mail"]


@pytest.mark.parametrize("location", [None, Location(unit=None), Location(unit="Theatre-2")])
def test_route_without_a_known_unit_uses_the_default(location: Location | None) -> None:
    assert route(make_notification(location=location), ROUTES, DEFAULT, ESCALATION) == DEFAULT


def test_route_adds_the_escalation_channels_once_for_an_escalated_flag() -> None:
    n = make_notification(event="escalated")
    assert route(n, ROUTES, DEFAULT, ESCALATION) == [
        "icu-north-hook",
        "icu-north-mail",
        "outreach-pager",
    ]


def test_every_channel_type_names_itself_in_its_docstring() -> None:
    for name, cls in CHANNEL_TYPES.items():
        assert f"Channel type: ``{name}``" in (cls.__doc__ or ""), name


def test_an_unknown_channel_type_names_the_alias_and_lists_the_known_types() -> None:
    with pytest.raises(ChannelConfigError) as caught:
        build_channel("ward-5b-pager", {"type": "sms"})
    message = str(caught.value)
    assert '"ward-5b-pager"' in message
    for name in CHANNEL_TYPES:
        assert name in message


def test_built_channels_keep_the_contract() -> None:
    channel = build_channel("house-log", {"type": "log"})
    assert isinstance(channel, Channel)
    channel.close()


def test_log_channel_writes_one_json_line_without_the_patient_key(
    caplog: pytest.LogCaptureFixture,
) -> None:
    n = make_notification()
    channel = build_channel("house-log", {"type": "log", "level": "INFO"})
    with caplog.at_level(logging.INFO, logger="gasgap.notify.house-log"):
        result = channel.send(n)
    assert result.ok
    [record] = [r for r in caplog.records if r.name == "gasgap.notify.house-log"]
    from monitor.logs import JsonFormatter

    # Through the service's own JSON formatter: one object with plain fields, no JSON
    # text nested inside a string.
    text = JsonFormatter().format(record)
    line = json.loads(text)
    assert line["flag_patient"] == "HGH bed ICU-N-1"
    assert line["flag_advisory"] == ADVISORY
    assert json.loads(line["flag_number_pf_ratio"])["value"] == 155.0
    assert not str(line["message"]).lstrip().startswith("{")
    assert "hgh-pt-0001" not in text
    assert n.idempotency_key not in text  # it may embed the patient key
    assert record.args  # lazy %s formatting, not a pre-built string


def test_a_channel_takes_its_secrets_from_the_caller_never_the_process_environment(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Issue 14 point 5: the composition root resolves secrets (environment, else the
    # secrets file) and hands them over; a channel that read os.environ itself would
    # bypass the secrets file and the `config check` list of unset names.
    monkeypatch.setenv("HGH_TEST_HOOK_TOKEN", "in-the-environment-only")
    options = {"type": "webhook", "url": "https://hooks.example.invalid/x"}
    options["token_env"] = "HGH_TEST_HOOK_TOKEN"
    with pytest.raises(ChannelConfigError, match="HGH_TEST_HOOK_TOKEN is not set"):
        build_channel("icu-north-hook", options)
    given = build_channel("icu-north-hook", options, secrets={"HGH_TEST_HOOK_TOKEN": "t0ken"})
    given.close()
