"""A stand-alone agent-side publisher for the MQTT tests (run as a child process).

Reads commands on stdin, one per line:
  ``alert FIRST COUNT``  queue COUNT event messages numbered FIRST.. (answers "ok")
  ``state NAME``         queue a retained state message (answers "ok")
  ``stop``               clean shutdown (flush, "offline", disconnect)
Prints "ready" once started. Being killed with SIGKILL is part of the tests.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from agent.mqtt import MqttLink, MqttSettings, event_payload, state_payload  # noqa: E402
from agent.outbox import Kind, Outbox  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--state-dir", required=True)
    ap.add_argument("--password-file", required=True)
    ap.add_argument("--client-id", default="agent-proc")
    a = ap.parse_args()
    settings = MqttSettings(host="127.0.0.1", port=a.port, client_id=a.client_id,
                            username="agent", password_file=a.password_file, prefix="skv",
                            site="plant1", asset="pump1", keepalive_s=5,
                            reconnect_min_s=0.1, reconnect_max_s=0.5)
    t = settings.topics
    outbox = Outbox(Path(a.state_dir) / "outbox.sqlite", overflow_topic=t.events)
    link = MqttLink(settings, outbox)
    link.start()
    print("ready", flush=True)
    for line in sys.stdin:
        words = line.split()
        if not words:
            continue
        if words[0] == "alert":
            first, count = int(words[1]), int(words[2])
            for n in range(first, first + count):
                link.send("events", event_payload("state_change", t_utc_s=time.time(),
                                                  state="alert", previous_state="normal",
                                                  severity="alert", detail={"n": n}),
                          kind=Kind.KEPT)
        elif words[0] == "state":
            link.send("state", state_payload(words[1], time.time(), "test", "none", "watch",
                                             t_utc_s=time.time()),
                      kind=Kind.KEPT, retain=True, replace_key="state")
        elif words[0] == "stop":
            link.stop(5)
            print("stopped", flush=True)
            return 0
        print("ok", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
