"""What the MQTT network process costs to start: its import time and resident memory, against a
process that imports paho-mqtt alone (the floor). Each measured in a fresh interpreter, median of
several runs. Usage: python bench/mqtt_child.py [--runs 7]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys

PROBE = """
import json, resource, sys, time
t = time.perf_counter()
{imports}
elapsed = time.perf_counter() - t
mods = sorted(m for m in sys.modules if m.startswith("watcher"))
print(json.dumps({{"s": elapsed, "rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                  "watcher_modules": len(mods), "numpy": "numpy" in sys.modules}}))
"""
CASES = {
    "paho-mqtt alone": "import paho.mqtt.client",
    "watcher's MQTT process": "import watcher.ingest.mqtt_process, watcher.ingest.mqtt",
}


def measure(imports: str) -> dict:
    out = subprocess.run(
        [sys.executable, "-c", PROBE.format(imports=imports)], capture_output=True, text=True, check=True
    )
    return json.loads(out.stdout)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=7)
    args = ap.parse_args()
    results = {}
    for name, imports in CASES.items():
        runs = [measure(imports) for _ in range(args.runs)]
        results[name] = {
            "import_s": statistics.median(r["s"] for r in runs),
            "rss_mb": statistics.median(r["rss_mb"] for r in runs),
            "watcher_modules": runs[0]["watcher_modules"],
            "numpy": runs[0]["numpy"],
        }
        r = results[name]
        print(
            f"{name:<24} import {r['import_s']:.3f} s  RSS {r['rss_mb']:.1f} MB  "
            f"watcher modules {r['watcher_modules']}  numpy {'yes' if r['numpy'] else 'no'}"
        )
    floor, child = results["paho-mqtt alone"], results["watcher's MQTT process"]
    print(
        f"ratio to paho alone: import {child['import_s'] / floor['import_s']:.2f}x, RSS {child['rss_mb'] / floor['rss_mb']:.2f}x"
    )


if __name__ == "__main__":
    main()
