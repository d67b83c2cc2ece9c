"""The computation core imports and records without matplotlib or ipywidgets."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap


def test_wrap_and_record_do_not_import_plotting_or_widgets():
    code = textwrap.dedent("""
        import json, sys
        import numpy as np
        import torch
        import hiddenlens as hl

        system = hl.wrap(torch.nn.GRU(3, 4, batch_first=True))
        trace = hl.record(system, np.zeros((2, 5, 3), np.float32))
        trace.select(steps=slice(1, 3))
        hl.record(lambda s, x: 0.5 * s, np.zeros((1, 3, 0)), np.ones(2), state_size=2,
                  input_size=0, progress=True)  # step functions go through tqdm.auto
        heavy = sorted(m for m in sys.modules
                       if m.split(".")[0] in ("matplotlib", "ipywidgets", "IPython"))
        print(json.dumps(heavy))
    """)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []
