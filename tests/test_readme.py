"""The README tells the truth: every config option is documented, every command appears with an
example, and its two commands are the ones CI and the demo test run."""

from __future__ import annotations

import re
from pathlib import Path

import click
import pytest

from limitwatch import config as cfg
from limitwatch.alerts.notifiers.registry import known_types, settings_model
from limitwatch.cli import main

ROOT = Path(__file__).parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def section(title: str) -> str:
    start = README.index(f"\n### {title}")
    end = README.find("\n### ", start + 1)
    end = README.find("\n## ", start + 1) if end < 0 else min(end, README.find("\n## ", start + 1))
    return README[start:end]


SECTIONS = [
    ("`[store]`", cfg.StoreSection),
    ("`[service]`", cfg.ServiceSection),
    ("`[defaults]` and `[[streams]]`", cfg.StreamEntry),
    ("`[alerts]` and `[[alerts.severity]]`", cfg.AlertsSection),
    ("`[alerts]` and `[[alerts.severity]]`", cfg.SeverityEntry),
    ('`[[sources]]` with `type = "mqtt"`', cfg.MqttSourceConfig),
    ('`[[sources]]` with `type = "mqtt"`', cfg.TlsSettings),
    ('`[[sources]]` with `type = "mqtt"`', cfg.MqttTopic),
    ('`[[sources]]` with `type = "file"`', cfg.FileSourceConfig),
    ("`[[routes]]` and `[budget]`", cfg.Route),
    ("`[[routes]]` and `[budget]`", cfg.BudgetSection),
]


@pytest.mark.parametrize(("title", "model"), SECTIONS, ids=[m.__name__ for _, m in SECTIONS])
def test_every_config_option_is_in_the_readme_reference(title, model):
    text = section(title)
    missing = [name for name in model.model_fields if f"`{name}`" not in text]
    assert not missing, f"README section {title} does not document {missing}"


@pytest.mark.parametrize("kind", sorted(known_types()))
def test_every_notifier_option_is_in_the_readme_reference(kind):
    text = section("`[[notifiers]]`")
    row = next(line for line in text.splitlines() if line.startswith(f"| `{kind}` |"))
    missing = [
        n
        for n in settings_model(kind).model_fields
        if n not in {"type", "name"} and f"`{n}`" not in row
    ]
    assert not missing, f"README's {kind} notifier row does not document {missing}"


def commands(group: click.Group, prefix: str = "limitwatch") -> list[str]:
    out = []
    for name, command in group.commands.items():
        if isinstance(command, click.Group):
            out += commands(command, f"{prefix} {name}")
        else:
            out.append(f"{prefix} {name}")
    return out


@pytest.mark.parametrize("command", commands(main))
def test_every_command_is_listed_with_an_example(command):
    words = command.split()
    listed = re.escape(" ".join(words[:2]))
    assert re.search(rf"`{listed}[ `]", README), f"{command} is not in the command table"
    assert re.search(rf"^{re.escape(command)}( |$)", README, re.M), f"no example of {command}"


def test_the_two_commands_are_the_ones_ci_and_the_demo_test_run():
    blocks = re.findall(r"```sh\n(.*?)\n```", README, re.S)
    demo, tests = blocks[0], blocks[1]
    assert demo.strip().endswith(".venv/bin/limitwatch demo")
    assert tests.strip() == "bash scripts/test.sh"
    ci = (ROOT / ".ci" / "run").read_text()
    assert re.search(r"^bash scripts/test\.sh\b", ci, re.M), "CI must run the README's test command"
    assert '"demo"' in (ROOT / "tests" / "test_demo.py").read_text()


def test_the_readme_starts_with_the_job_and_carries_the_caution():
    first = README.split("\n\n")[1]
    assert "XmR" in first and "monitoring aid, not a safety system" in first
    assert (ROOT / "docs" / "pack-2-downtime.png").exists()


def test_the_webhook_check_the_readme_gives_receivers_accepts_a_real_delivery(monkeypatch):
    """The README's receiver code, run as written, against a request the webhook notifier
    really sent to a local HTTP server; and it refuses a tampered body, a wrong key, a
    signature of the wrong length and a replay outside its window."""
    import time

    from limitwatch.alerts.notifiers import build_notifier
    from tests.receivers import WebhookReceiver

    text = section("`[[notifiers]]`")
    (code,) = re.findall(r"```python\n(.*?)\n```", text, re.S)
    space: dict = {}
    exec(compile(code, "README.md", "exec"), space)  # our own README, run as written
    verify = space["verify"]

    monkeypatch.setenv("LW_README_HOOK_KEY", "line-2-shared-key")
    with WebhookReceiver() as receiver:
        notifier = build_notifier(
            {"type": "webhook", "name": "ops-hook", "url": receiver.url,
             "secret_env": "LW_README_HOOK_KEY"}
        )  # fmt: skip
        notifier.deliver({"stream": "kiln-3/temp", "value": 871.5}, event_id="5:opened:0")
    (got,) = receiver.all()
    key = b"line-2-shared-key"
    stamp = int(got.headers["X-Limitwatch-Timestamp"])
    assert abs(stamp - time.time()) < 60  # whole seconds since the epoch, as documented
    assert verify(key, got.headers, got.body)
    assert not verify(key, got.headers, got.body.replace(b"871.5", b"871.6"))
    assert not verify(b"another-key", got.headers, got.body)
    assert not verify(key, got.headers, got.body, now=stamp + 301)  # a replay, later
    assert verify(key, got.headers, got.body, now=stamp + 299)
    short = dict(got.headers.items())
    short["X-Limitwatch-Signature"] = got.headers["X-Limitwatch-Signature"][:-2]
    assert not verify(key, short, got.body)
