"""`relaxline fit MODEL INPUT... --out DIR`: voxelwise maps (design §4–§6)."""
from __future__ import annotations

import argparse

HELP = "Fit a relaxation model voxelwise and write maps (ir, vfa, dam, ...)"
DESCRIPTION = """Fit a relaxation model voxel by voxel and write BIDS-derivative maps.

Models: ir (inversion recovery: T1, M0, inversion efficiency; magnitude or complex),
vfa (variable flip angle: T1, M0; --b1 scales the nominal angles; RF-spoiled steady
state when the sidecar says so, see --spoiling), dam (double
angle alpha/2alpha: TB1map), mese (CPMG multi-echo spin echo by extended phase graphs:
T2, M0 and the refocusing scale TB1map, reported below the symmetry point of the echo
train, 180/nominal refocusing angle, or as fitted with --slice-profile; with --b1 the B1 scale
comes from the map and only T2 and M0 are fitted; with --t1-map each voxel's T1 comes
from a T1 map, e.g. from `relaxline fit ir`; echoes must sit at TE = k*ESP),
mese-mono (mono-exponential T2, optional --plateau and --skip-echoes N), megre
(T2* from multi-echo gradient echo magnitudes), looklocker (inversion recovery with a
continuous readout, and the modified sequences used for cardiac T1: T1 = T1*(B/A - 1),
M0, apparent T1* as _T1starmap; --ll-correction readout takes T1 from T1* and the
readout angle FlipAngle and pulse spacing RepetitionTimeExcitation, with --b1), sr
(saturation recovery, delays in the sidecar key SaturationDelay: T1, M0, saturation
efficiency _SatEffmap), afi (actual flip-angle imaging, two volumes with their
RepetitionTime TR1 < TR2: TB1map; --t1-fixed for the exact finite-TR solution and M0),
mp2rage (complex inv-1/inv-2 images with the BIDS MP2RAGE keys: T1 and the uniform
image _UNIT1 by lookup, M0; --b1 corrects the readout angles) and mese-multi (T2
distribution of a long CPMG train by regularised NNLS over an EPG basis with fitted
refocusing angle: geometric-mean T2, short-T2 fraction _MWFmap, M0, TB1map, and the
distribution as the 4D _T2distmap; fast engine only).

Outputs in --out, with BIDS-derivative names: the input's stem without its raw
suffix and volume entities, the model in rec- (sub-01_ses-1_IRT1 fitted by ir ->
sub-01_ses-1_rec-ir), then _T1map.nii.gz (s), _M0map,
_InvEffmap (ir inversion efficiency, -cos of the inversion angle), _TB1map (ratio),
_desc-stderr_<map>, _desc-rmse_<primary map> (rms residual, signal units) and
_desc-fitstatus_mask (uint8: 0 outside, 1 converged, 2 converged after lmfit refit,
3 parameter at bound, 4 failed, 5 non-finite or empty data), each with a JSON sidecar.
Without --mask, air is kept out of the fit: voxels whose signal stays within the noise
of the image background (estimated from the Rayleigh statistics of the air) are marked
outside. --noise auto (default) fits magnitude data with the Rician noise floor when a
background is found.

A QA and research tool, not a medical device."""


def add_series_arguments(p: argparse.ArgumentParser) -> None:
    """MODEL, INPUT..., --b1 and --time-unit (shared with ``relaxline refit``)."""
    p.add_argument("model", metavar="MODEL",
                   help="ir, vfa, dam, mese, mese-mono, megre, looklocker, sr, afi, mp2rage, "
                        "mese-multi")
    p.add_argument("inputs", metavar="INPUT", nargs="+",
                   help="one 4D NIfTI or several 3D NIfTIs, each with a JSON sidecar")
    p.add_argument("--b1", metavar="F",
                   help="B1 map (actual/nominal flip-angle ratio) on the series grid "
                        "(vfa, mp2rage, looklocker --ll-correction readout; mese: B1 then "
                        "fixed from the map)")
    p.add_argument("--t1-map", metavar="F",
                   help="T1 map in seconds on the series grid: each voxel's own T1 for the "
                        "models that use one (mese: the echo-train model; dam: the finite-TR "
                        "correction of the double-angle pair; afi: the exact finite-TR "
                        "solution). Inside the fitted region it must hold "
                        "T1 > 0 everywhere, unless --t1-fixed gives the T1 used where the map "
                        "has no value (NaN or 0)")
    p.add_argument("--slice-profile", metavar="F.tsv|sinc:TBW[:RATIO]",
                   help="mese on a 2D (slice-selective) acquisition: the echo train is summed "
                        "over the slice's flip-angle profile. F.tsv: tab-separated columns "
                        "position, excitation, refocusing (actual/nominal flip angle at "
                        "equally weighted positions; position only orders the rows). "
                        "sinc:TBW[:RATIO]: both profiles by spinor simulation (256 steps) "
                        "of B1(t) ~ sinc(TBW*u)*(1+cos(2*pi*u))/2, u = t/T - 1/2 in "
                        "[-1/2, 1/2] (zero crossings every T/TBW; TBW 1-20), the same shape "
                        "for excitation and refocusing, each with the sidecar's nominal "
                        "angle as its area, the excitation's slice gradient refocused, "
                        "crushers around the refocusing pulses, relaxation during the pulses "
                        "neglected, only the flip angle at each position kept; RATIO (0.2-5, "
                        "default 1) = refocusing / excitation slice width (a RATIO times "
                        "weaker refocusing gradient). B1 scales the RF of the whole profile: "
                        "a TSV's scales are multiplied by B1, the built-in pulse is simulated "
                        "at each B1")
    p.add_argument("--t1-fixed", type=float, metavar="S",
                   help="mese, mese-multi: T1 (s) of the echo-train model (default 1.0; it "
                        "only weights the stimulated echoes); with --t1-map, the T1 used where "
                        "the map has no value. afi: the T1 (s) of the exact finite-TR solution "
                        "(default: the TR << T1 closed form). dam: one T1 for the finite-TR "
                        "correction (default none: full recovery assumed)")
    p.add_argument("--ll-correction", choices=("ratio", "readout"),
                   help="looklocker: ratio = T1*(B/A - 1) (default, no readout parameters); "
                        "readout = from T1*, FlipAngle and RepetitionTimeExcitation (continuous "
                        "spoiled readout only)")
    p.add_argument("--inversion-efficiency", type=float, metavar="E",
                   help="mp2rage: inversion efficiency of the lookup, -Mz after/Mz before "
                        "(default 0.96)")
    p.add_argument("--spoiling", choices=("auto", "ideal", "rf"),
                   help="vfa: steady state of the spoiled gradient echo. rf: RF spoiling "
                        "with a quadratic phase schedule, by extended phase graphs (no "
                        "diffusion) with --assumed-t2; ideal: the Ernst formula (every "
                        "transverse magnetisation destroyed); auto (default): rf when the "
                        "sidecar's SpoilingType is RF or COMBINED or it gives "
                        "SpoilingRFPhaseIncrement, else ideal")
    p.add_argument("--spoiling-increment", type=float, metavar="DEG",
                   help="vfa: RF phase increment (degrees) when the sidecar lacks "
                        "SpoilingRFPhaseIncrement")
    p.add_argument("--assumed-t2", type=float, metavar="S",
                   help="vfa with RF spoiling: the T2 (s) of the steady-state model "
                        "(default 0.05; the residual transverse coherence grows with T2)")
    p.add_argument("--time-unit", choices=("s", "ms"), default="s",
                   help="unit of the times in the sidecars (BIDS: s)")


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_series_arguments(p)
    p.add_argument("--out", required=True, metavar="DIR", help="output folder")
    p.add_argument("--mask", metavar="F", help="fit only where this mask is non-zero")
    p.add_argument("--engine", choices=("fast", "lmfit"), default="fast",
                   help="fast: compiled per-voxel engine (default); lmfit: one lmfit fit per "
                        "voxel (slow; the reference)")
    p.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="cores to fit on: threads of the fast engine, processes of lmfit "
                        "fits (default: all this process may use). The maps do not depend "
                        "on it")
    add_model_arguments(p)


def add_model_arguments(p: argparse.ArgumentParser) -> None:
    """Model options: T2 model variants and the noise model."""
    g = p.add_argument_group("model options")
    g.add_argument("--short-t2-cutoff", type=float, metavar="S",
                   help="mese-multi: upper T2 (s) of the short-T2 fraction (default 0.040)")
    g.add_argument("--plateau", action="store_true",
                   help="mese-mono: also fit a constant signal level the decay tends to "
                        "(noise floor, non-decaying component); written as _Plateaumap")
    g.add_argument("--skip-echoes", type=int, metavar="N",
                   help="mese-mono: leave out the first N echoes (e.g. 1: the first echo "
                        "carries no stimulated echo and breaks the train's pattern)")
    g.add_argument("--noise", choices=("auto", "gaussian", "rician"), default="auto",
                   help="rician: fit the Rician expectation of magnitude data given the "
                        "background noise (removes the noise-floor bias at low SNR; needs "
                        "air around the object); auto (default): rician for magnitude data "
                        "with a background, gaussian for complex data or without one")


def series_options(args: argparse.Namespace) -> dict:
    """Model options of :func:`add_series_arguments` (shared with refit), only those set."""
    out = {"t1_fixed": args.t1_fixed, "slice_profile": args.slice_profile,
           "ll_correction": args.ll_correction,
           "inversion_efficiency": args.inversion_efficiency, "spoiling": args.spoiling,
           "spoiling_increment": args.spoiling_increment, "assumed_t2": args.assumed_t2}
    return {k: v for k, v in out.items() if v is not None}


def model_options(args: argparse.Namespace) -> dict:
    """The model options given on the command line (only those set)."""
    out = {**series_options(args), "plateau": args.plateau,
           "skip_echoes": args.skip_echoes, "short_t2_cutoff": args.short_t2_cutoff,
           "noise": args.noise}
    # `is` tests: --t1-fixed 0 / --skip-echoes 0 must reach validation, not vanish as "== False"
    return {k: v for k, v in out.items() if v is not None and v is not False}


def run(args: argparse.Namespace) -> int:
    from pipeline.fitjob import fit_command
    paths = fit_command(args.model, args.inputs, args.out, mask=args.mask, b1=args.b1,
                        engine=args.engine, jobs=args.jobs, time_unit=args.time_unit,
                        model_options=model_options(args), t1_map=args.t1_map)
    print(f"relaxline fit: wrote {len(paths)} maps to {args.out}")
    return 0
