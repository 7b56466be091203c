"""Record, or compare, the results of every shipped sequence on every shipped simulator config.

Why: a change that should not move results (a reshaping, a speed-up) is checked by recording these
figures before it and comparing after.  For each sequence x simulator config it runs
`pycnoctl run ... --json` and `pycnoctl analyze` of the record, and keeps both outputs.

    python bench/result_figures.py record before.json      # on the code before the change
    python bench/result_figures.py record after.json       # after it
    python bench/result_figures.py compare before.json after.json

Compare ignores what legitimately differs between runs (run ids, clock times, software version,
checkout paths) and prints each case whose live or replayed result moved.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

SEQUENCES = ["grain-volume", "calibration", "leak-check", "purge-only", "quick-demo"]
CONFIGS = ["clean", "noisy", "leaky", "regulator_failure"]
VOLATILE = {"run_id", "started_utc", "ended_utc", "wall_time_s", "software", "stored_volume_cm3"}
ROOT = Path(__file__).resolve().parents[1]


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "pycnoctl.controller.cli.main", *args],
                          capture_output=True, text=True, cwd=ROOT)


def _json(p: subprocess.CompletedProcess[str]) -> Any:
    try:
        return json.loads(p.stdout)
    except ValueError:
        return {"rc": p.returncode, "out": p.stdout[-500:], "err": p.stderr[-500:]}


def record(out: Path) -> None:
    res: dict[str, Any] = {}
    for seq in SEQUENCES:
        for cfg in CONFIGS:
            data = Path(tempfile.mkdtemp(prefix="pycnoctl-figures-"))
            live = _cli("run", seq, "--sim", str(ROOT / "sim" / "configs" / f"{cfg}.yaml"), "--data", str(data),
                        "--json", "--quiet", "--sample", "X-1", "--mass", "19.62g")
            runs = sorted((data / "runs").iterdir()) if (data / "runs").exists() else []
            replay = _json(_cli("analyze", str(runs[0]), "--json")) if runs else None
            res[f"{seq}|{cfg}"] = {"rc": live.returncode, "live": _json(live), "analyze": replay}
            print(seq, cfg, live.returncode, flush=True)
    out.write_text(json.dumps(res, indent=1, sort_keys=True, default=str))


def _load(path: Path) -> Any:
    text = re.sub(r"\"/[^\"]*?/(sequences|sim)/", r'"/\1/', path.read_text())  # checkout paths
    return json.loads(text)


def _strip(x: Any) -> Any:
    if isinstance(x, dict):
        return {k: _strip(v) for k, v in x.items() if k not in VOLATILE}
    if isinstance(x, list):
        return [_strip(v) for v in x]
    return x


def compare(a_path: Path, b_path: Path) -> int:
    a, b = _load(a_path), _load(b_path)
    moved = 0
    for case in sorted(a):
        for part in ("rc", "live", "analyze"):
            if _strip(a[case].get(part)) != _strip(b.get(case, {}).get(part)):
                moved += 1
                print("moved:", case, part)
    print(f"compared {len(a)} cases; {moved} moved")
    return 1 if moved else 0


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "record":
        record(Path(sys.argv[2]))
    elif len(sys.argv) == 4 and sys.argv[1] == "compare":
        sys.exit(compare(Path(sys.argv[2]), Path(sys.argv[3])))
    else:
        sys.exit(__doc__)
