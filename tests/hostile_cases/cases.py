"""The hostile cases: every malformed input crossed with the commands that read it.

A :class:`Case` is plain data (picklable, printable): the command line with ``{in}`` / ``{work}``
placeholders, the recipe that builds its input tree (see :mod:`.builders`), what the input is
(``expect``: ``error`` when it is invalid and must be refused or warned about, ``valid`` when it is
acceptable, ``either`` when both a clean error and a result are right) and whether it may run a
whole analysis or simulation (``slow``).

Families (``kind``):

* ``ion-file`` — malformed CSV/TSV/HDF5 ion files and non-files in their place;
* ``ion-file-random`` — valid ion files hit by seeded random byte mutations;
* ``range-file`` / ``range-file-random`` — malformed range TOML files, named and random;
* ``lattice`` / ``lattice-random`` — malformed lattice TOML files, named and random;
* ``run-folder`` — broken ``run.toml`` (path traversal, paths outside, wrong types, missing files);
* ``damaged-output`` — damaged ``columns`` / ``analyze`` output folders given to decode, export, compare;
* ``option`` — hostile option values of all nine commands;
* ``out-path`` — output paths that point at inputs, with and without ``--force``.
"""

from __future__ import annotations

import re
import zlib
from dataclasses import dataclass

from . import builders as B

COMMANDS = ("simulate", "inspect", "range", "columns", "decode", "analyze", "compare", "plan", "export")
KINDS = ("ion-file", "ion-file-random", "range-file", "range-file-random", "lattice", "lattice-random",
         "run-folder", "damaged-output", "option", "out-path")


@dataclass(frozen=True)
class Case:
    """One hostile command line and the recipe of its input tree."""

    id: str
    command: str
    kind: str
    argv: tuple
    recipe: tuple = ()
    expect: str = "error"
    slow: bool = False

    @property
    def slug(self) -> str:
        """A file-name-safe, unique form of the id."""
        s = re.sub(r"[^A-Za-z0-9._-]+", "_", self.id)
        return f"{s[:80]}-{zlib.crc32(self.id.encode()) & 0xFFFFFFFF:08x}"

    def command_line(self) -> str:
        """The command line as a user would type it (placeholders kept)."""
        return "probeseq " + " ".join(self.argv)


def _step(builder, **params):
    return (builder, tuple(sorted(params.items())))


def _seed(*parts) -> int:
    return zlib.crc32("/".join(map(str, parts)).encode()) & 0x7FFFFFFF


LAT = ("--lattice", "{in}/lattice.toml")
ANALYZE_FAST = ("--n-boot", "20", "--n-starts", "1")
PLAN_FAST = ("--runs-per-pattern", "1", "--runs-per-persistence", "1", "--tip-radius", "3", "--depth", "5")


def _ion_argv(command: str, ion: str):
    if command == "inspect":
        return ("inspect", ion)
    if command == "range":
        return ("range", ion, "--metals", "Co,Zn", "--out", "{work}/ranges_out.toml")
    if command == "columns":
        return ("columns", ion, "--metals", "Co,Zn", *LAT, "--out", "{work}/cols")
    return ("analyze", ion, "--metals", "Co,Zn", *LAT, "--out", "{work}/an", *ANALYZE_FAST)


def _ion_expect(command: str, expect: str) -> str:
    if expect == "valid" and command in ("range", "columns", "analyze"):
        return "either"  # 400 ions: a clean "too few ions" error is right too
    return expect


# ---------------------------------------------------------------------- families
def _ion_file_cases():
    out = []
    names = {"valid_tsv": "ions.tsv"}
    path_names = {"csv_named_h5": "ions.h5", "h5_named_csv": "ions.csv", "unknown_extension": "ions.xyz",
                  "no_extension": "ions", "uppercase_extension": "ions.CSV", "dotfile_csv": ".csv"}
    big = {"header_10mb", "huge_field", "huge_line_count_header_only"}
    groups = [("text", B.TEXT_ION_VARIANTS, lambda v: names.get(v, "ions.csv")),
              ("hdf5", B.H5_ION_VARIANTS, lambda v: "ions.h5"),
              ("path", B.PATH_ION_VARIANTS, lambda v: path_names.get(v, "ions.csv"))]
    for fmt, variants, namer in groups:
        for v, expect in variants.items():
            cmds = ("inspect", "analyze") if v == "huge_sparse" else ("inspect", "range", "columns", "analyze")
            for cmd in cmds:
                name = namer(v)
                recipe = [_step("ion_file", variant=v, fmt=fmt, name=name, seed=_seed(v, cmd))]
                if cmd in ("columns", "analyze"):
                    recipe.append(_step("copy_base", what="lattice", dest="lattice.toml"))
                out.append(Case(f"{cmd}/ion-{fmt}-{v}", cmd, "ion-file", _ion_argv(cmd, "{in}/" + name),
                                tuple(recipe), _ion_expect(cmd, expect), slow=v in big or v == "huge_sparse"))
    return out


def _ion_random_cases(n_text=40, n_h5=25):
    out = []
    for cmd in ("inspect", "range", "analyze"):
        for i in range(n_text):
            recipe = [_step("mutate_ions", fmt="text", name="ions.csv", seed=_seed("text", cmd, i))]
            if cmd == "analyze":
                recipe.append(_step("copy_base", what="lattice", dest="lattice.toml"))
            out.append(Case(f"{cmd}/ion-text-mutation-{i:03d}", cmd, "ion-file-random",
                            _ion_argv(cmd, "{in}/ions.csv"), tuple(recipe), "either"))
    for cmd in ("inspect", "columns"):
        for i in range(n_h5):
            recipe = [_step("mutate_ions", fmt="hdf5", name="ions.h5", seed=_seed("h5", cmd, i))]
            if cmd == "columns":
                recipe.append(_step("copy_base", what="lattice", dest="lattice.toml"))
            out.append(Case(f"{cmd}/ion-hdf5-mutation-{i:03d}", cmd, "ion-file-random",
                            _ion_argv(cmd, "{in}/ions.h5"), tuple(recipe), "either"))
    return out


def _range_argv(cmd):
    if cmd == "range":
        return ("range", "{in}/ions.h5", "--metals", "Co,Zn", "--ranges", "{in}/ranges.toml",
                "--out", "{work}/ranges_out.toml")
    if cmd == "columns":
        return ("columns", "{in}/ions.h5", "--metals", "Co,Zn", *LAT, "--ranges", "{in}/ranges.toml",
                "--out", "{work}/cols")
    return ("analyze", "{in}/ions.h5", "--metals", "Co,Zn", *LAT, "--ranges", "{in}/ranges.toml",
            "--out", "{work}/an", *ANALYZE_FAST)


def _range_cases():
    out = []
    for v, expect in B.RANGE_VARIANTS.items():
        for cmd in ("range", "columns", "analyze"):
            recipe = (_step("small_ions", name="ions.h5"), _step("copy_base", what="lattice", dest="lattice.toml"),
                      _step("range_file", variant=v, seed=_seed(v)))
            e = "either" if expect == "valid" and cmd != "range" else expect
            out.append(Case(f"{cmd}/range-{v}", cmd, "range-file", _range_argv(cmd), recipe, e,
                            slow=v == "many_ranges"))
    # the range file given where the ion file belongs, and the ion file given as the range file
    out.append(Case("range/range-file-is-ion-file", "range", "range-file",
                    ("range", "{in}/ions.h5", "--metals", "Co,Zn", "--ranges", "{in}/ions.h5", "--out",
                     "{work}/r.toml"), (_step("small_ions", name="ions.h5"),), "error"))
    return out


def _range_random_cases(n=30):
    out = []
    for cmd, count in (("range", n), ("analyze", n // 2)):
        for i in range(count):
            recipe = (_step("small_ions", name="ions.h5"), _step("copy_base", what="lattice", dest="lattice.toml"),
                      _step("mutate_range", seed=_seed("range", cmd, i)))
            out.append(Case(f"{cmd}/range-mutation-{i:03d}", cmd, "range-file-random", _range_argv(cmd), recipe,
                            "either"))
    return out


def _lattice_argv(cmd, lat="{in}/lattice.toml"):
    if cmd == "columns":
        return ("columns", "{in}/ions.h5", "--metals", "Co,Zn", "--lattice", lat, "--out", "{work}/cols")
    if cmd == "analyze":
        return ("analyze", "{in}/ions.h5", "--metals", "Co,Zn", "--lattice", lat, "--out", "{work}/an", *ANALYZE_FAST)
    return ("plan", "--metals", "Co,Zn", "--lattice", lat, *PLAN_FAST)


def _lattice_cases():
    out = []
    variants = {k: v[3] for k, v in B.LATTICE_VARIANTS.items()}
    variants.update(B.LATTICE_FILE_VARIANTS)
    for v, expect in variants.items():
        name = "lattice.txt" if v == "txt_extension" else "lattice.toml"
        for cmd in ("columns", "analyze", "plan"):
            recipe = (_step("small_ions", name="ions.h5"), _step("lattice_file", variant=v, name=name, seed=_seed(v)))
            e = "either" if expect == "valid" and cmd != "plan" else expect
            slow = cmd == "plan" and expect != "error"
            out.append(Case(f"{cmd}/lattice-{v}", cmd, "lattice", _lattice_argv(cmd, "{in}/" + name), recipe, e, slow))
    return out


def _lattice_random_cases(n=35):
    out = []
    for cmd, count in (("columns", n), ("analyze", n), ("plan", n // 2)):
        for i in range(count):
            seed = _seed("lattice", cmd, i)
            _, expect = B.random_lattice_spec(seed)
            recipe = (_step("small_ions", name="ions.h5"), _step("random_lattice", seed=seed))
            e = expect if cmd == "plan" else ("error" if expect == "error" else "either")
            out.append(Case(f"{cmd}/lattice-random-{i:03d}", cmd, "lattice-random", _lattice_argv(cmd), recipe, e,
                            slow=cmd == "plan" and expect != "error"))
    return out


def _run_folder_cases():
    out = []
    variants = {k: v[2] for k, v in B.RUN_VARIANTS.items()}
    variants.update(B.RUN_FILE_VARIANTS)
    for v, expect in variants.items():
        outside = "dotdot" in v or "absolute" in v
        recipe = (_step("run_folder", variant=v, outside=outside),)
        default_out = v.startswith("name_")
        argv = ("analyze", "{in}/run", *ANALYZE_FAST) if default_out else \
            ("analyze", "{in}/run", "--out", "{work}/an", *ANALYZE_FAST)
        slow = expect != "error" or outside
        out.append(Case(f"analyze/run-{v}", "analyze", "run-folder", argv, recipe, expect, slow))
    batches = {"all-bad": ("ions_missing_file", "metals_one"), "one-good": ("valid", "eta_2"),
               "bad-toml": ("run_toml_binary", "no_run_table"), "traversal": ("name_traversal", "ions_int")}
    for name, vs in batches.items():
        out.append(Case(f"analyze/run-batch-{name}", "analyze", "run-folder",
                        ("analyze", "{in}/batch", "--out", "{work}/batch_out", *ANALYZE_FAST),
                        (_step("batch_folder", variants=vs),), "error", slow="valid" in vs or "name_traversal" in vs))
    out.append(Case("analyze/run-batch-out-inside-batch", "analyze", "run-folder",
                    ("analyze", "{in}/batch", "--out", "{in}/batch/out", *ANALYZE_FAST),
                    (_step("batch_folder", variants=("ions_missing_file", "metals_one")),), "error"))
    return out


# Files of an analysis folder that export (results, columns, decoded) or compare (results,
# bootstrap replicates) never reads.
UNREAD_BY_EXPORT = {"bootstrap_missing", "bootstrap_truncated", "tracks_missing", "temperature_text",
                    "temperature_list", "sample_is_list", "metals_not_list", "no_provenance"}
UNREAD_BY_COMPARE = {"columns_truncated", "columns_missing", "columns_random", "decoded_truncated",
                     "decoded_missing", "decoded_nan_posteriors", "decoded_wrong_shape", "tracks_missing"}


def _damaged_output_cases():
    out = []
    for dmg, expect in B.ANALYSIS_DAMAGE.items():
        recipe = (_step("damage_analysis", damage=dmg),)
        # a damaged file the command never reads may be ignored: then a result is right too
        exp_export = "either" if dmg in UNREAD_BY_EXPORT else expect
        exp_compare = "either" if dmg in UNREAD_BY_COMPARE else expect
        for fmt in ("csv", "json", "hdf5", "png"):
            argv = ("export", "{in}/analysis", "--format", fmt)
            if fmt != "csv":
                argv += ("--out", f"{{work}}/tracks.{fmt}")
            if fmt == "png":
                argv += ("--dpi", "60")
            out.append(Case(f"export/damaged-{dmg}-{fmt}", "export", "damaged-output", argv, recipe, exp_export))
        out.append(Case(f"compare/damaged-{dmg}", "compare", "damaged-output",
                        ("compare", "{in}/analysis", "--out", "{work}/cmp"), recipe, exp_compare))
        out.append(Case(f"compare/damaged-{dmg}-with-good", "compare", "damaged-output",
                        ("compare", "{in}/good", "{in}/analysis", "--out", "{work}/cmp"),
                        recipe + (_step("copy_base", what="analysis", dest="good"),), exp_compare))
    for dmg, expect in B.COLUMNS_DAMAGE.items():
        out.append(Case(f"decode/damaged-{dmg}", "decode", "damaged-output",
                        ("decode", "{in}/columns", "--out", "{work}/dec", "--n-starts", "1"),
                        (_step("damage_columns", damage=dmg),), expect))
    out.append(Case("decode/damaged-not-a-folder", "decode", "damaged-output",
                    ("decode", "{in}/file.txt", "--out", "{work}/dec"), (_step("write_file", name="file.txt", text="x"),)))
    out.append(Case("decode/damaged-analysis-folder-given", "decode", "damaged-output",
                    ("decode", "{in}/analysis", "--out", "{work}/dec", "--n-starts", "1"),
                    (_step("copy_base", what="analysis", dest="analysis"),), "either"))
    return out


def _option_cases():
    out = []

    def add(cmd, tag, argv, recipe=(), expect="error", slow=False):
        out.append(Case(f"{cmd}/option-{tag}", cmd, "option", tuple(argv), tuple(recipe), expect, slow))

    sim = ("simulate", "{work}/sim/ions.h5", "--tip-radius", "3", "--depth", "6", "-q")
    sim_opts = [
        ("seed-negative", ["--seed", "-1"]), ("seed-2^70", ["--seed", str(2 ** 70)]), ("seed-text", ["--seed", "abc"]),
        ("top-radius-0", ["--tip-radius", "0"]), ("top-radius-negative", ["--tip-radius", "-1"]),
        ("top-radius-nan", ["--tip-radius", "nan"]), ("depth-inf", ["--depth", "inf"]), ("depth-nan", ["--depth", "nan"]),
        ("depth-0", ["--depth", "0"]), ("a-1e300", ["--a", "1e300"]), ("a-0", ["--a", "0"]), ("a-nan", ["--a", "nan"]),
        ("a-negative", ["--a", "-2.6"]), ("a-1e-300", ["--a", "1e-300"]), ("repeat-0", ["--repeat", "0"]),
        ("repeat-inf", ["--repeat", "inf"]), ("sites-0", ["--sites-per-repeat", "0"]),
        ("sites-negative", ["--sites-per-repeat", "-1"]), ("composition-nan", ["--composition", "nan,nan"]),
        ("composition-one-value", ["--composition", "0.5"]), ("composition-three-values", ["--composition", "1,1,1"]),
        ("composition-negative", ["--composition", "-0.5,1.5"]), ("composition-sum-0.6", ["--composition", "0.3,0.3"]),
        ("composition-empty", ["--composition", ""]), ("composition-inf", ["--composition", "inf,1"]),
        ("metals-lowercase", ["--metals", "co,zn"]), ("metals-unknown", ["--metals", "Xx,Zn"]),
        ("metals-one", ["--metals", "Co"]), ("metals-duplicate", ["--metals", "Co,Co"]), ("metals-empty", ["--metals", ""]),
        ("metals-empty-item", ["--metals", "Co,,Zn"]), ("pattern-bogus", ["--pattern", "bogus"]),
        ("persistence-1", ["--persistence", "1"]), ("persistence-negative", ["--persistence", "-0.1"]),
        ("persistence-nan", ["--persistence", "nan"]), ("copy-error-2", ["--copy-error", "2"]),
        ("copy-error-nan", ["--copy-error", "nan"]), ("eta-0", ["--detection-efficiency", "0"]), ("eta-2", ["--detection-efficiency", "2"]),
        ("eta-nan", ["--detection-efficiency", "nan"]), ("sigma-xy-negative", ["--lateral-blur", "-1"]), ("sigma-z-inf", ["--depth-blur", "inf"]),
        ("mrp-0", ["--mrp", "0"]), ("mrp-negative", ["--mrp", "-600"]), ("half-angle-90", ["--half-angle", "90"]),
        ("half-angle-negative", ["--half-angle", "-5"]), ("packing-hex", ["--lattice", "hex"]),
    ]
    for tag, extra in sim_opts:
        add("simulate", tag, sim + tuple(extra))
    for tag, extra in (("top-radius-500", ["--tip-radius", "500"]), ("depth-1e9", ["--depth", "1e9"]),
                       ("a-0.01", ["--a", "0.01"]), ("repeat-1e-9", ["--repeat", "1e-9"]),
                       ("sites-100000", ["--sites-per-repeat", "100000"])):
        add("simulate", tag, sim + tuple(extra), slow=True)
    add("simulate", "composition-1-0", sim + ("--composition", "1,0"), expect="either")
    add("simulate", "out-xyz-extension", ("simulate", "{work}/sim/ions.xyz", "--tip-radius", "3", "--depth", "6"))
    add("simulate", "out-no-extension", ("simulate", "{work}/sim/ions", "--tip-radius", "3", "--depth", "6"))
    add("simulate", "out-deep-new-folder", ("simulate", "{work}/a/b/c/ions.csv", "--tip-radius", "3", "--depth", "6"),
        expect="valid")
    add("simulate", "out-existing-folder", ("simulate", "{in}/folder.h5", "--tip-radius", "3", "--depth", "6"),
        (_step("make_dir", name="folder.h5"),))

    ins = ("inspect", "{in}/ions.h5")
    ions_h5 = (_step("small_ions", name="ions.h5"),)
    for tag, extra, expect in (
            ("length-unit-furlong", ["--length-unit", "furlong"], "error"), ("length-unit-empty", ["--length-unit", ""], "error"),
            ("length-unit-NM", ["--length-unit", "NM"], "either"), ("length-unit-angstrom", ["--length-unit", "angstrom"], "valid"),
            ("position-dataset-missing", ["--position-dataset", "/nope"], "error"),
            ("position-dataset-1d", ["--position-dataset", "/ions/x"], "error"),
            ("position-dataset-group", ["--position-dataset", "/ions"], "error"),
            ("position-dataset-empty", ["--position-dataset", ""], "error"),
            ("mass-dataset-missing", ["--mass-dataset", "/nope"], "error"),
            ("mass-dataset-group", ["--mass-dataset", "/ions"], "error"),
            ("mass-dataset-only", ["--mass-dataset", "/ions/mass_to_charge"], "either"),
            ("json-and-strict", ["--json", "--strict"], "valid")):
        add("inspect", tag, ins + tuple(extra), ions_h5, expect)
    add("inspect", "position-dataset-on-csv", ("inspect", "{in}/ions.csv", "--position-dataset", "/x"),
        (_step("small_ions", name="ions.csv"),), "error")
    add("inspect", "strict-with-nan-rows", ("inspect", "{in}/ions.csv", "--strict"),
        (_step("ion_file", variant="nan_coords", fmt="text", name="ions.csv"),), "error")
    add("inspect", "no-argument", ("inspect",))
    add("inspect", "unknown-option", ("inspect", "{in}/ions.h5", "--bogus"), ions_h5)

    rng = ("range", "{in}/ions.h5", "--out", "{work}/r.toml")
    for tag, extra, expect in (
            ("metals-lowercase", ["--metals", "co,zn"], "error"), ("metals-unknown", ["--metals", "Xx,Zn"], "error"),
            ("metals-one", ["--metals", "Co"], "error"), ("metals-duplicate", ["--metals", "Co,Co"], "error"),
            ("metals-empty", ["--metals", ""], "error"), ("metals-empty-item", ["--metals", "Co,,Zn"], "error"),
            ("metals-spaces", ["--metals", " Co , Zn "], "either"), ("metals-missing", [], "error"),
            ("metals-100", ["--metals", ",".join(["Co", "Zn", "Ni", "Fe", "Mn", "Cu", "Mg", "Cd"] * 13)], "error"),
            ("species-unknown", ["--metals", "Co,Zn", "--species", "Zz"], "error"),
            ("species-C999999999999", ["--metals", "Co,Zn", "--species", "C999999999999"], "error"),
            ("species-only-plus", ["--metals", "Co,Zn", "--species", "++"], "error"),
            ("species-empty", ["--metals", "Co,Zn", "--species", ""], "error"),
            ("species-empty-item", ["--metals", "Co,Zn", "--species", "H2O,,CO"], "error"),
            ("species-charge-99", ["--metals", "Co,Zn", "--species", "C" + "+" * 99], "error"),
            ("figure-xyz", ["--metals", "Co,Zn", "--figure", "{work}/f.xyz"], "error"),
            ("figure-no-folder", ["--metals", "Co,Zn", "--figure", "{work}/nodir/f.png"], "either"),
            ("out-existing-folder", ["--metals", "Co,Zn", "--out", "{work}"], "error"),
            ("length-unit-parsec", ["--metals", "Co,Zn", "--length-unit", "parsec"], "error")):
        add("range", tag, rng + tuple(extra), ions_h5, expect)

    cols = ("columns", "{in}/run/ions.h5", "--out", "{work}/cols")
    run_only = (_step("copy_base", what="run", dest="run"),)
    latf = ("--metals", "Co,Zn", "--lattice", "{in}/run/lattice.toml")
    for tag, extra in (
            ("scale-1e-9", ["--scale", "1e-9"]), ("scale-0", ["--scale", "0"]), ("scale-negative", ["--scale", "-1"]),
            ("scale-nan", ["--scale", "nan"]), ("scale-inf", ["--scale", "inf"]), ("scale-1e9", ["--scale", "1e9"]),
            ("rotation-nan", ["--rotation-deg", "nan"]), ("rotation-inf", ["--rotation-deg", "inf"]),
            ("rotation-1e308", ["--rotation-deg", "1e308"]), ("offset-nan", ["--offset-nm", "nan,nan"]),
            ("offset-one-number", ["--offset-nm", "1"]), ("offset-text", ["--offset-nm", "a,b"]),
            ("offset-1e308", ["--offset-nm", "1e308,1e308"]), ("offset-inf", ["--offset-nm", "inf,0"]),
            ("seed-negative", ["--seed", "-1"]), ("seed-2^70", ["--seed", str(2 ** 70)]),
            ("metals-lowercase", ["--metals", "co,zn"])):
        base = latf if not any(e.startswith("--metals") for e in extra) else ("--lattice", "{in}/run/lattice.toml")
        add("columns", tag, cols + base + tuple(extra), run_only)
    for tag, extra in (
            ("preset-a-1e300", ["--lattice", "honeycomb", "--a", "1e300", "--repeat", "0.68"]),
            ("preset-a-0", ["--lattice", "honeycomb", "--a", "0", "--repeat", "0.68"]),
            ("preset-repeat-nan", ["--lattice", "honeycomb", "--a", "2.6", "--repeat", "nan"]),
            ("preset-sites-0", ["--lattice", "honeycomb", "--a", "2.6", "--repeat", "0.68", "--sites-per-repeat", "0"]),
            ("preset-unknown", ["--lattice", "hexagonal", "--a", "2.6", "--repeat", "0.68"]),
            ("preset-without-a", ["--lattice", "honeycomb"]), ("lattice-missing", [])):
        add("columns", tag, cols + ("--metals", "Co,Zn") + tuple(extra), run_only)
    add("columns", "length-unit-angstrom", cols + latf + ("--length-unit", "angstrom"), run_only, "either")
    add("columns", "metals-absent-from-data", cols + ("--metals", "Co,Ni", "--lattice", "{in}/run/lattice.toml"),
        run_only, "either")

    dec = ("decode", "{in}/columns", "--out", "{work}/dec")
    cols_only = (_step("copy_base", what="columns", dest="columns"),)
    for tag, extra, expect, slow in (
            ("n-starts-0", ["--n-starts", "0"], "error", False), ("n-starts-negative", ["--n-starts", "-1"], "error", False),
            ("n-starts-text", ["--n-starts", "abc"], "error", False), ("seed-negative", ["--seed", "-1"], "error", False),
            ("seed-2^64", ["--seed", str(2 ** 64)], "error", False),
            ("n-starts-1e6", ["--n-starts", "1000000"], "either", True), ("missing-folder", [], "error", False)):
        argv = dec + tuple(extra)
        recipe = cols_only if tag != "missing-folder" else ()
        add("decode", tag, argv, recipe, expect, slow)

    ana = ("analyze", "{in}/run", "--out", "{work}/an", *ANALYZE_FAST)
    for tag, extra in (
            ("seed-negative", ["--seed", "-1"]), ("n-boot-0", ["--n-boot", "0"]), ("n-boot-negative", ["--n-boot", "-5"]),
            ("alpha-2", ["--alpha", "2"]), ("alpha-0", ["--alpha", "0"]), ("alpha-negative", ["--alpha", "-0.1"]),
            ("alpha-nan", ["--alpha", "nan"]), ("copy-threshold-nan", ["--copy-threshold", "nan"]),
            ("copy-threshold-2", ["--copy-threshold", "2"]), ("long-block-0", ["--long-block-sites", "0"]),
            ("long-block-negative", ["--long-block-sites", "-1"]), ("long-block-nan", ["--long-block-sites", "nan"]),
            ("long-block-inf", ["--long-block-sites", "inf"]), ("n-starts-0", ["--n-starts", "0"]),
            ("scale-1e-9", ["--scale", "1e-9"]), ("metals-lowercase", ["--metals", "co,zn"]),
            ("metals-one", ["--metals", "Co"]), ("length-unit-parsec", ["--length-unit", "parsec"]),
            ("offset-nan", ["--offset-nm", "nan,nan"]), ("rotation-inf", ["--rotation-deg", "inf"]),
            ("preset-a-1e300", ["--lattice", "honeycomb", "--a", "1e300", "--repeat", "0.68"]),
            ("preset-unknown", ["--lattice", "hexagonal"])):
        add("analyze", tag, ana + tuple(extra), run_only, slow=True)
    add("analyze", "n-boot-1e6", ana + ("--n-boot", "1000000"), run_only, "either", slow=True)
    add("analyze", "ions-file-without-metals", ("analyze", "{in}/run/ions.h5", "--out", "{work}/an"), run_only)
    add("analyze", "missing-input", ("analyze", "{in}/nothing", "--out", "{work}/an"))
    add("analyze", "empty-folder", ("analyze", "{in}/empty", "--out", "{work}/an"), (_step("make_dir", name="empty"),))

    two = (_step("copy_base", what="analysis", dest="a1"), _step("copy_base", what="analysis", dest="a2"))
    cmp_ = ("compare", "{in}/a1", "{in}/a2", "--out", "{work}/cmp")
    for tag, extra, expect in (
            ("by-empty", ["--by", ""], "either"), ("by-unknown-field", ["--by", "no_such_field"], "either"),
            ("by-name", ["--by", "name"], "either"), ("by-dotted", ["--by", "provenance.seed"], "either"),
            ("seed-negative", ["--seed", "-1"], "error"), ("seed-2^70", ["--seed", str(2 ** 70)], "error")):
        add("compare", tag, cmp_ + tuple(extra), two, expect)
    add("compare", "same-folder-twice", ("compare", "{in}/a1", "{in}/a1", "--out", "{work}/cmp"), two, "either")
    add("compare", "missing-folder", ("compare", "{in}/nope", "--out", "{work}/cmp"))
    add("compare", "file-given", ("compare", "{in}/a1/results.json", "--out", "{work}/cmp"), two)
    add("compare", "empty-folder", ("compare", "{in}/empty", "--out", "{work}/cmp"), (_step("make_dir", name="empty"),))
    add("compare", "out-is-existing-file", ("compare", "{in}/a1", "--out", "{in}/notes.txt"),
        two + (_step("write_file", name="notes.txt", text="my notes\n"),))
    add("compare", "folder-of-analyses", ("compare", "{in}", "--out", "{work}/cmp"), two, "either")

    plan = ("plan", "--metals", "Co,Zn", "--lattice", "honeycomb", "--a", "2.6", "--repeat", "0.68", *PLAN_FAST)
    for tag, extra in (
            ("efficiency-0", ["--detection-efficiency", "0"]), ("efficiency-2", ["--detection-efficiency", "2"]),
            ("efficiency-nan", ["--detection-efficiency", "nan"]), ("efficiency-negative", ["--detection-efficiency", "-1"]),
            ("lateral-negative", ["--lateral-blur", "-1"]), ("lateral-nan", ["--lateral-blur", "nan"]),
            ("lateral-inf", ["--lateral-blur", "inf"]), ("runs-per-pattern-0", ["--runs-per-pattern", "0"]),
            ("runs-per-pattern-negative", ["--runs-per-pattern", "-1"]),
            ("runs-per-persistence-0", ["--runs-per-persistence", "0"]), ("radius-0", ["--tip-radius", "0"]),
            ("radius-nan", ["--tip-radius", "nan"]), ("radius-negative", ["--tip-radius", "-3"]), ("depth-inf", ["--depth", "inf"]),
            ("depth-0", ["--depth", "0"]), ("depth-nan", ["--depth", "nan"]), ("seed-negative", ["--seed", "-1"]),
            ("metals-one", ["--metals", "Co"]), ("metals-lowercase", ["--metals", "co,zn"]),
            ("a-1e300", ["--a", "1e300"]), ("a-0", ["--a", "0"]), ("sites-0", ["--sites-per-repeat", "0"]),
            ("lattice-unknown-preset", ["--lattice", "hexagonal"])):
        add("plan", tag, plan + tuple(extra))
    add("plan", "radius-500", plan + ("--tip-radius", "500"), slow=True)
    add("plan", "lattice-missing", ("plan", "--metals", "Co,Zn", *PLAN_FAST))
    add("plan", "out-no-folder", plan + ("--out", "{work}/nodir/plan.json"), expect="either", slow=True)

    exp = ("export", "{in}/analysis")
    an_only = (_step("copy_base", what="analysis", dest="analysis"),)
    for tag, extra, expect in (
            ("format-xyz", ["--format", "xyz"], "error"), ("format-empty", ["--format", ""], "error"),
            ("format-uppercase", ["--format", "CSV", "--out", "{work}/t.csv"], "either"),
            ("rods-reversed", ["--rods", "10-5"], "error"), ("rods-negative", ["--rods", "-1"], "error"),
            ("rods-text", ["--rods", "a"], "error"), ("rods-empty-item", ["--rods", "1,,2"], "error"),
            ("rods-unknown", ["--rods", "99999"], "error"), ("rods-huge-range", ["--rods", "0-99999999999"], "error"),
            ("rods-open-range", ["--rods", "3-"], "error"), ("rods-blank", ["--rods", " "], "either"),
            ("depth-reversed", ["--depth-window", "20:10"], "error"), ("depth-text", ["--depth-window", "a:b"], "error"),
            ("depth-nan", ["--depth-window", "nan:nan"], "error"), ("depth-inf-reversed", ["--depth-window", "inf:-inf"], "error"),
            ("depth-colon-only", ["--depth-window", ":"], "either"), ("depth-one-number", ["--depth-window", "5"], "error"),
            ("depth-three-parts", ["--depth-window", "1:2:3"], "error"), ("depth-outside-run", ["--depth-window", "1e6:2e6"], "error"),
            ("depth-whole-line", ["--depth-window", "-inf:inf"], "either"), ("size-huge", ["--size", "huge"], "error"),
            ("dpi-0", ["--format", "png", "--dpi", "0", "--out", "{work}/t.png"], "error"),
            ("dpi-negative", ["--format", "png", "--dpi", "-1", "--out", "{work}/t.png"], "error"),
            ("dpi-100000", ["--format", "png", "--dpi", "100000", "--out", "{work}/t.png"], "error"),
            ("out-no-folder", ["--out", "{work}/nodir/t.csv"], "either"),
            ("out-is-folder", ["--out", "{work}"], "error"),
            ("format-png-out-csv", ["--format", "png", "--dpi", "60", "--out", "{work}/t.csv"], "either")):
        add("export", tag, exp + tuple(extra), an_only, expect)
    add("export", "columns-folder-given", ("export", "{in}/columns"), (_step("copy_base", what="columns", dest="columns"),))
    return out


def _out_path_cases():
    out = []

    def add(cmd, tag, argv, recipe, expect="error", slow=False):
        out.append(Case(f"{cmd}/out-{tag}", cmd, "out-path", tuple(argv), tuple(recipe), expect, slow))

    run = (_step("copy_base", what="run", dest="run"),)
    rng = ("range", "{in}/run/ions.h5", "--metals", "Co,Zn")
    for tag, extra in (("onto-ion-file", ["--out", "{in}/run/ions.h5"]),
                       ("onto-lattice-file", ["--out", "{in}/run/lattice.toml"]),
                       ("onto-run-toml", ["--out", "{in}/run/run.toml"]),
                       ("onto-run-folder", ["--out", "{in}/run"]),
                       ("onto-ranges-input", ["--ranges", "{in}/ranges.toml", "--out", "{in}/ranges.toml"]),
                       ("onto-existing-range-file", ["--out", "{in}/ranges.toml"]),
                       ("figure-onto-ion-file", ["--out", "{work}/r.toml", "--figure", "{in}/run/ions.h5"]),
                       ("figure-onto-existing-figure", ["--out", "{work}/r.toml", "--figure", "{in}/figure.png"]),
                       ("figure-onto-existing-figure-force", ["--out", "{work}/r.toml", "--figure", "{in}/figure.png",
                                                              "--force"]),
                       ("figure-same-as-out", ["--out", "{work}/r.png", "--figure", "{work}/r.png"])):
        add("range", tag, rng + tuple(extra), run + (_step("copy_base", what="ranges.toml", dest="ranges.toml"),
                                                    _step("write_file", name="figure.png", png=True)))

    cols = ("columns", "{in}/run/ions.h5", "--metals", "Co,Zn", "--lattice", "{in}/run/lattice.toml",
            "--ranges", "{in}/ranges.toml")
    cr = run + (_step("copy_base", what="ranges.toml", dest="ranges.toml"),)
    for force in (False, True):
        f = ("--force",) if force else ()
        sfx = "-force" if force else ""
        for tag, target in (("run-folder", "{in}/run"), ("run-parent", "{in}"), ("ion-file", "{in}/run/ions.h5"),
                            ("lattice-file", "{in}/run/lattice.toml"), ("ranges-file", "{in}/ranges.toml")):
            add("columns", f"onto-{tag}{sfx}", cols + ("--out", target) + f, cr, slow=force)
        dec = ("decode", "{in}/columns", "--n-starts", "1")
        for tag, target in (("columns-folder", "{in}/columns"), ("columns-parent", "{in}"),
                            ("columns-file", "{in}/columns/columns.h5")):
            add("decode", f"onto-{tag}{sfx}", dec + ("--out", target) + f,
                (_step("copy_base", what="columns", dest="columns"),))
        ana = ("analyze", "{in}/run", *ANALYZE_FAST)
        for tag, target in (("run-folder", "{in}/run"), ("run-parent", "{in}"), ("ion-file", "{in}/run/ions.h5"),
                            ("lattice-file", "{in}/run/lattice.toml")):
            add("analyze", f"onto-{tag}{sfx}", ana + ("--out", target) + f, run, slow=True)
        add("analyze", f"onto-analysis-holding-ranges-input{sfx}",
            ana + ("--ranges", "{in}/prev/ranges.toml", "--out", "{in}/prev") + f,
            run + (_step("copy_base", what="analysis", dest="prev"),), slow=True)
        add("analyze", f"onto-previous-results{sfx}", ana + ("--out", "{work}/prev") + f,
            run + (_step("copy_base", what="analysis", dest="prev", where="work"),),
            "valid" if force else "error", slow=True)
        two = (_step("copy_base", what="analysis", dest="a1"), _step("copy_base", what="analysis", dest="a2"))
        cmp_ = ("compare", "{in}/a1", "{in}/a2")
        for tag, target in (("input-analysis", "{in}/a1"), ("inputs-parent", "{in}"),
                            ("results-json", "{in}/a1/results.json")):
            add("compare", f"onto-{tag}{sfx}", cmp_ + ("--out", target) + f, two)
    exp = ("export", "{in}/analysis")
    an = (_step("copy_base", what="analysis", dest="analysis"), _step("write_file", name="figure.png", png=True))
    for tag, extra in (("results-json", ["--format", "json", "--out", "{in}/analysis/results.json"]),
                       ("columns-h5", ["--format", "hdf5", "--out", "{in}/analysis/columns.h5"]),
                       ("analysis-folder", ["--out", "{in}/analysis"]),
                       ("tracks-csv", ["--out", "{in}/analysis/tracks.csv"]),
                       ("existing-figure", ["--format", "png", "--dpi", "60", "--out", "{in}/figure.png"]),
                       ("existing-figure-force", ["--format", "png", "--dpi", "60", "--out", "{in}/figure.png",
                                                  "--force"])):
        add("export", tag, exp + tuple(extra), an)
    plan = ("plan", "--metals", "Co,Zn", "--lattice", "{in}/lattice.toml", *PLAN_FAST)
    lat = (_step("copy_base", what="lattice", dest="lattice.toml"), _step("write_file", name="plan.json", text="{}\n"))
    add("plan", "onto-lattice-input", plan + ("--out", "{in}/lattice.toml"), lat, slow=True)
    add("plan", "onto-existing-json", plan + ("--out", "{in}/plan.json"), lat, slow=True)
    add("plan", "onto-folder", plan + ("--out", "{in}"), lat, slow=True)
    sim = ("--tip-radius", "3", "--depth", "6")
    add("simulate", "onto-existing-ion-file", ("simulate", "{in}/run/ions.h5", *sim), run)
    add("simulate", "onto-existing-lattice-sibling", ("simulate", "{in}/run/ions2.h5", *sim),
        run + (_step("copy_base", what="lattice", dest="run/ions2.lattice.toml"),))
    add("simulate", "onto-run-folder", ("simulate", "{in}/run", *sim), run)
    add("simulate", "onto-run-toml", ("simulate", "{in}/run/run.toml", *sim), run)
    return out


# ---------------------------------------------------------------------- selection
def all_cases() -> list:
    """Every case of the sweep, in a fixed order; ids are unique."""
    cases = (_ion_file_cases() + _ion_random_cases() + _range_cases() + _range_random_cases() + _lattice_cases()
             + _lattice_random_cases() + _run_folder_cases() + _damaged_output_cases() + _option_cases()
             + _out_path_cases())
    ids = [c.id for c in cases]
    if len(set(ids)) != len(ids):
        dup = sorted({i for i in ids if ids.count(i) > 1})
        raise ValueError(f"duplicate case ids: {dup[:5]}")
    return cases


def pytest_subset(n: int = 150, slow_quota: int = 4) -> list:
    """A deterministic subset covering every command and every kind.

    Cases are grouped by (command, kind); groups are visited round-robin, each giving its next
    case in evenly spread order, until ``n`` are chosen. At most ``slow_quota`` slow cases (output
    paths pointing at a run folder, the most important data-loss checks) are included.
    """
    cases = all_cases()
    groups = {}
    for c in cases:
        if c.slow:
            continue
        groups.setdefault((c.command, c.kind), []).append(c)
    order = {}
    for key, members in groups.items():
        m = len(members)
        # spread: 0, m/2, m/4, 3m/4, ... so the first picks of a big group differ in variant
        seen, picks, step = set(), [], m
        while len(picks) < m:
            for j in range(0, m, max(1, step)):
                if j not in seen:
                    seen.add(j)
                    picks.append(members[j])
            step = max(1, step // 2)
        order[key] = picks
    chosen = [c for c in cases if c.slow and c.kind == "out-path" and c.command == "analyze"
              and ("run-folder" in c.id or "run-parent" in c.id)][:slow_quota]
    keys = sorted(order)
    i = 0
    while len(chosen) < n and any(order.values()):
        key = keys[i % len(keys)]
        if order[key]:
            chosen.append(order[key].pop(0))
        i += 1
    return chosen
