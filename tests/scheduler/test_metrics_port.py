"""`lampyr head --metrics-port 0`: a real head process binds a free port, says which one in its
log line, and serves the metrics there (no logging traceback)."""

from __future__ import annotations

import re
import time
import urllib.request

from tests.conftest import Farm


def test_metrics_port_0_binds_a_free_port_and_names_it(tmp_path):
    farm = Farm(tmp_path, None)
    try:
        farm.start_head(embedded=True, extra=["--metrics-port", 0, "--no-web"])
        give_up_at = time.monotonic() + 30
        while True:
            log = (tmp_path / "head.log").read_text(errors="replace")
            found = re.search(r"metrics: http://127\.0\.0\.1:(\d+)/metrics", log)
            if found or time.monotonic() > give_up_at:
                break
            time.sleep(0.1)
        assert found, log
        assert "Traceback" not in log and "Logging error" not in log, log
        port = int(found[1])
        assert 0 < port < 65536
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as res:
            body = res.read().decode()
        # the Prometheus text format (exposition format 0.0.4): HELP and TYPE lines per family
        assert res.status == 200 and "# TYPE lampyr_" in body
    finally:
        farm.stop()
