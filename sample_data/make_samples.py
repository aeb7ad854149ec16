"""Regenerate the bundled sample runs (synthetic; made by probeseq's own simulator).

Scenario (invented): "rodnet-7", a fictional bimetallic rod framework with Co and Zn in its rods,
made in two batches at two synthesis temperatures. The low-temperature batch is simulated with the
metals arranged at random along the rods, the high-temperature batch in long blocks.

Run:  python sample_data/make_samples.py
"""

from pathlib import Path

import numpy as np

from probeseq.io.readers import write_ions
from probeseq.simulation.simulate import simulate_run

HERE = Path(__file__).resolve().parent

RUNS = {
    "rodnet7-batch-090C": dict(pattern="random", temperature=90, seed=101),
    "rodnet7-batch-150C": dict(pattern="long-block", temperature=150, seed=202),
}

DESCRIPTION = """# run description: what was measured and how (probeseq run-folder layout)
[sample]
name = "{name}"
synthesis_temperature_c = {temperature}
synthetic = true

[run]
ions = "ions.h5"
metals = ["Co", "Zn"]
lattice = "lattice.toml"
detection_efficiency = 0.5
"""

ABOUT = """{name}: SYNTHETIC sample run, not a measurement.

Made by probeseq's forward simulator (sample_data/make_samples.py) for the invented scenario
"rodnet-7", a fictional Co/Zn rod framework made at {temperature} C. Simulated arrangement of the
metals along the rods: {pattern}. Honeycomb rod packing, a = 2.6 nm, repeat 0.68 nm with 3 metal
sites per repeat, detection efficiency 0.5, lateral blur 0.10 nm.

Files: ions.h5 (ion list, /ions/x,y,z in nm and mass_to_charge in Da), lattice.toml (rod lattice),
run.toml (run description), truth.json (what the simulator put in, for checking the analysis).
"""


def main():
    for name, spec in RUNS.items():
        run = simulate_run(pattern=spec["pattern"], metals=("Co", "Zn"), top_radius_nm=6.5, depth_nm=32.0,
                           seed=spec["seed"])
        d = HERE / name
        d.mkdir(exist_ok=True)
        ions = run.ions
        from probeseq.io.ions import IonList
        slim = IonList(x=ions.x, y=ions.y, z=ions.z, mass_to_charge=ions.mass_to_charge)
        write_ions(slim, d / "ions.h5", dtype=np.float32)
        (d / "lattice.toml").write_text(run.lattice.to_toml())
        (d / "run.toml").write_text(DESCRIPTION.format(name=name, temperature=spec["temperature"]))
        (d / "ABOUT.txt").write_text(ABOUT.format(name=name, **spec))
        import json
        (d / "truth.json").write_text(json.dumps(run.truth, sort_keys=True))
        print(name, run.truth["counts"])


if __name__ == "__main__":
    main()
