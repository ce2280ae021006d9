from __future__ import annotations

import io
import json
import logging

from relay.live.logs import setup_logging


def test_json_logs_are_one_object_per_line_with_fields() -> None:
    stream = io.StringIO()
    setup_logging("json", "info", stream=stream)
    logging.getLogger("rehear.test").info("dead letter", extra={"fields": {"reason": "schema"}})
    logging.getLogger("rehear.test").debug("hidden")
    [line] = stream.getvalue().splitlines()
    event = json.loads(line)
    assert event["msg"] == "dead letter" and event["reason"] == "schema" and event["level"] == "info"


def test_plain_logs_show_fields_as_key_value() -> None:
    stream = io.StringIO()
    setup_logging("plain", "debug", stream=stream)
    logging.getLogger("rehear.test").warning("reconnecting", extra={"fields": {"in_s": 0.5}})
    assert stream.getvalue().rstrip().endswith("WARNING rehear.test: reconnecting in_s=0.5")
