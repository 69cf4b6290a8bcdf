import sys, json, time, subprocess
sys.path.insert(0, "/work/main")
cfg = json.load(open("/tmp/prof/db.json"))
from bench.common import Service
import httpx
svc = Service(cfg["sa"], extra_env={"BELATED_LOG_FORMAT": "text"})
try:
    svc.wait_ready()
    q = {"granularity": "day", "start": "2025-01-01T00:00:00Z", "end": "2026-01-01T00:00:00Z"}
    spy = subprocess.Popen(["/tmp/pyspy/bin/py-spy", "record", "--pid", str(svc.pid), "--format", "raw", "-o", "/tmp/prof/spy.txt", "--rate", "200", "--duration", "12", "--nonblocking"])
    time.sleep(1)
    with httpx.Client(headers={"Authorization": f"Bearer {cfg['token']}"}, timeout=60) as c:
        t0 = time.time()
        n = 0
        while time.time() - t0 < 10:
            c.get(f"{svc.url}/v1/models/returns-bench/metrics", params=q).raise_for_status(); n += 1
    print("requests", n)
    spy.wait()
finally:
    svc.stop()
