"""Build notebooks/walkthrough.ipynb (run: python notebooks/make_walkthrough.py).

The notebook walks through the library API on a bundled sample run, stage by stage. The test
suite executes it (tests/test_notebook.py), so it cannot rot.
"""

from pathlib import Path

import nbformat as nbf

cells = [
    ("md", """# probeseq walkthrough: from an ion list to the metal sequence along the rods

This notebook runs the library on a bundled **synthetic** sample run (`sample_data/rodnet7-batch-150C`,
an invented Co/Zn rod framework; see its `ABOUT.txt`) one stage at a time, showing what each stage
finds. The command `probeseq analyze` runs the same stages in one go."""),
    ("code", """from pathlib import Path
import numpy as np
import matplotlib
matplotlib.use("Agg")
import matplotlib.pyplot as plt
from IPython.display import Image, display

import probeseq
from probeseq.io.readers import read_ions
from probeseq.lattice.model import Lattice
from probeseq.study.runinfo import read_run_folder

here = Path.cwd()
root = here if (here / "sample_data").exists() else here.parent
run = read_run_folder(root / "sample_data" / "rodnet7-batch-150C")
ions = read_ions(run.ions)
lattice = Lattice.from_spec(run.lattice)
print(probeseq.__version__, run.name, run.sample)
print(ions.summary()["n_ions"], "ions; z range", ions.summary()["z_range_nm"], "nm")"""),
    ("md", """## 1. Mass spectrum and ranging
Peaks are found on a background-aware spectrum, matched to the predicted isotope lines of the metals
(M+, M2+, oxide and hydroxide ions) and of linker fragments, and the mass scale is calibrated on the
matched peaks. Every ion then gets a channel: a metal, `other` or `unranged`."""),
    ("code", """from probeseq.ranging.auto import auto_range
from probeseq.ranging.channels import assign_channels
from probeseq.ranging.plot import plot_ranging

rr = auto_range(ions.mass_to_charge, run.metals)
comp = rr.to_dict()["composition"]
for m in run.metals:
    print(f"{m}: {100 * comp[m]['fraction']:.2f} % +- {100 * comp[m]['fraction_err']:.2f} % of metal atoms")
print(len(rr.ranges), "ranges;", len(rr.unmatched), "strong peaks left unranged")
plot_ranging(rr, "walkthrough_spectrum")  # writes walkthrough_spectrum.png and .svg
display(Image("walkthrough_spectrum.png"))"""),
    ("md", """## 2. Registering the rod lattice and cutting the rods into sites
The known rod packing is fitted to the projected density of metal ions (rotation, lateral scale,
offset, rod tilt), the lateral spread of ions around the rod axes gives the expected misassigned fraction (share of a rod's ions nearer another rod)
between rods, and every metal ion is binned into its rod and site."""),
    ("code", """from probeseq.lattice.columns import build_columns
from probeseq.lattice.plot import plot_rod_density

assign = assign_channels(ions.mass_to_charge, rr.ranges, run.metals)
w = assign.weights()
metal = w.sum(1) > 0
columns = build_columns(ions.x[metal], ions.y[metal], ions.z[metal], w[metal], run.metals, lattice, random_state=0)
reg = columns.params["registration"]
print(f"rotation {reg['rotation_deg']:.2f} deg, scale {reg['scale']:.4f}, lateral spread {reg['sigma_xy_nm']:.3f} nm")
print(f"{columns.n_rods} rods x {columns.n_sites} sites, {int(columns.mask.sum())} used; "
      f"misassigned fraction {columns.misassigned_fraction:.3f}, resolvable: {columns.resolvable}")
plot_rod_density(ions.x[metal], ions.y[metal], ions.z[metal], columns, "walkthrough_density.png")
display(Image("walkthrough_density.png"))"""),
    ("md", """## 3. Decoding every rod with a hidden Markov model
The model knows that a site may leave no ion (detection efficiency), that some counts come from
neighbouring rods or the background, and that one transition matrix describes all rods."""),
    ("code", """from probeseq.decoding.decode import fit_decoder

dec = fit_decoder(columns, n_starts=2, random_state=0)
print(f"detection efficiency {dec.eta:.3f}, persistence {dec.persistence:.3f}")
print("transition matrix\\n", np.round(dec.transmat, 3))
print(f"independent sites: likelihood ratio {dec.lr_stat:.1f}, p = {dec.lr_pvalue:.2g}; BIC {dec.bic:.0f} vs {dec.bic_indep:.0f}")
print(f"{dec.uncertain.sum()} of {dec.mask.sum()} sites uncertain (best posterior < {dec.uncertain_below})")"""),
    ("md", """## 4. Statistics and classification
Estimates come from the fitted model (expected transition counts), with intervals from a bootstrap over rods."""),
    ("code", """from probeseq.statistics.summary import compute_statistics
from probeseq.statistics.classify import classify

st = compute_statistics(dec, columns, n_boot=50, random_state=0)
cl = classify(st, dec.lr_pvalue)
print("verdict:", cl.label, f"(confidence {cl.confidence:.2f})")
for reason in cl.reasons:
    print(" -", reason)"""),
    ("md", """## 5. Sequence tracks
Rods as parallel tracks along depth, each site coloured by its decoded metal; lighter where the
posterior is low, blank where no ion was detected."""),
    ("code", """from probeseq.outputs.tracks import plot_tracks

used = np.flatnonzero(columns.mask.sum(1) > 100)[:12]
fig = plot_tracks(columns, dec, "walkthrough_tracks.png", rods=used, depth_nm=(5, 20), size="two-column", dpi=120)
display(Image("walkthrough_tracks.png"))"""),
    ("md", """**Cautions.** These labels are statistical inferences from a model of the data, on a synthetic
run; on real data check the ranging and the registration figures, and support any chemical conclusion
with other evidence (see the README's "Cautions and limits")."""),
]

nb = nbf.v4.new_notebook()
nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
for kind, text in cells:
    nb.cells.append(nbf.v4.new_markdown_cell(text) if kind == "md" else nbf.v4.new_code_cell(text))
out = Path(__file__).resolve().parent / "walkthrough.ipynb"
nbf.write(nb, out)
print("wrote", out)
