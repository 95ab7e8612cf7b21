"""``case.updated`` webhooks, end to end on SQLite and PostgreSQL: subscriptions made over
real HTTP choose their event types, review changes queue deliveries, the real delivery worker
sends them to a real HTTP receiver on loopback, and the Standard Webhooks reference package
(``standardwebhooks``, the specification's own library) verifies every signature."""

from __future__ import annotations

import json
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from standardwebhooks.webhooks import Webhook

from rolewatch.delivery.worker import deliver_due

from .conftest import file_window, new_alert


class Inbox:
    """A loopback receiver: records each POST's path, headers and body; answers 204."""

    def __init__(self) -> None:
        self.received: list[tuple[str, dict[str, str], bytes]] = []
        inbox = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 - http.server's naming
                body = self.rfile.read(int(self.headers.get("content-length") or 0))
                headers = {k.lower(): v for k, v in self.headers.items()}
                inbox.received.append((self.path, headers, body))
                self.send_response(204)
                self.end_headers()

            def log_message(self, *args):
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"

    def at(self, path: str) -> list[tuple[dict[str, str], bytes]]:
        return [(headers, body) for got, headers, body in self.received if got == path]

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def _subscribe(client, url: str, **body) -> dict:
    made = client.post("/v1/subscriptions", json={"url": url, **body})
    assert made.status_code == 201, made.text
    return made.json()


def test_case_updates_reach_subscribers_signed_like_alerts(live):
    inbox = Inbox()
    try:
        with live.client("admin") as client:
            cases_json = _subscribe(client, f"{inbox.url}/cases", events=["case.updated"])
            both_text = _subscribe(
                client, f"{inbox.url}/chat", format="text", events=["alert.raised", "case.updated"]
            )
            alerts_only = _subscribe(client, f"{inbox.url}/alerts")
            wrong = client.post(
                "/v1/subscriptions", json={"url": f"{inbox.url}/x", "events": ["case.deleted"]}
            )
        assert cases_json["events"] == ["case.updated"]
        assert alerts_only["events"] == ["alert.raised"]  # as subscriptions were before
        assert wrong.status_code == 422

        file_window(live, live.settings, 0, [new_alert("m-fay", 6.0, 1, 2)])
        with live.client("reader") as client:
            (case,) = client.get("/v1/cases").json()["cases"]
        with live.client("mira") as client:
            done = client.patch(
                f"/v1/cases/{case['id']}",
                json={"version": 1, "state": "dismissed", "reason": "known_account"},
            )
            assert done.status_code == 200
        with live.client("reader") as client:  # notes are not sent
            client.post(f"/v1/cases/{case['id']}/notes", json={"text": "seen"})
        report = deliver_due(live.engine, live.settings)
        assert report is not None

        received = inbox.at("/cases")
        bodies = []
        for headers, body in received:
            # Raises when the signature, id or timestamp do not verify.
            Webhook(cases_json["secret"]).verify(body, headers)
            bodies.append(json.loads(body))
        assert [b["type"] for b in bodies] == ["case.updated", "case.updated"]
        changes = [(b["data"]["change"]["action"], b["data"]["case"]["state"]) for b in bodies]
        assert sorted(changes) == [("opened", "open"), ("state", "dismissed")]
        dismissal = next(b["data"] for b in bodies if b["data"]["change"]["action"] == "state")
        assert dismissal["change"]["by"] == {"key_id": live.ids["mira"], "name": "Mira (T&S)"}
        assert dismissal["change"]["from_state"] == "open"
        assert dismissal["change"]["reason"] == "known_account"
        assert dismissal["case"]["version"] == 2
        assert dismissal["case"]["url"] == f"{live.url}/cases/{case['id']}"

        chat = []
        for headers, body in inbox.at("/chat"):
            Webhook(both_text["secret"]).verify(body, headers)
            chat.append(json.loads(body)["text"])
        assert len(chat) == 3  # the alert, the case opened, the dismissal
        case_link = f"Case: {live.url}/cases/{case['id']}"
        assert all(case_link in text for text in chat), chat
        assert any(text.startswith("Role change for account `m-fay`") for text in chat)
        assert any("Reason: known account" in text and "Mira (T&S)" in text for text in chat)

        ((alert_headers, alert_body),) = inbox.at("/alerts")
        Webhook(alerts_only["secret"]).verify(alert_body, alert_headers)
        assert json.loads(alert_body)["type"] == "alert.raised"
    finally:
        inbox.close()
