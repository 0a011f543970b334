"""The public interface does not change by accident (the frozen list is ``tests/public_api.json``)."""

import json
import pathlib

from tests.public_api import snapshot

FROZEN = pathlib.Path(__file__).with_name("public_api.json")


def test_public_interface_is_the_frozen_one():
    frozen = json.loads(FROZEN.read_text(encoding="utf-8"))
    live = json.loads(json.dumps(snapshot(), sort_keys=True))
    for key in sorted(set(frozen) | set(live)):
        assert live.get(key) == frozen.get(key), (
            f"public interface changed at {key!r}; if on purpose, regenerate with "
            "`python -m tests.public_api > tests/public_api.json`")
