# Fit jobs: one per (session, model, series); volumes above fit.chunk_voxels are split
# into z-slab chunk jobs whose results the fit job gathers (identical maps).


def fit_inputs(wc):
    job = PLAN.job(wc.sub, wc.ses, wc.model, wc.stem)
    src = PLAN.b1_source(CFG, job)
    return {"series": job.inputs, "chunks": job.chunk_files(),
            "b1": [src.manifest()] if src else []}


def chunk_inputs(wc):
    d = fit_inputs(wc)
    del d["chunks"]
    return d


def b1_option(wc, input):
    return f"--b1-manifest {shlex.quote(input.b1[0])}" if input.b1 else ""


def model_option(wc, key):
    m = CFG["models"][wc.model]
    return m.get(key, CFG["fit"]["engine"] if key == "engine" else "s")


rule fit_chunk:
    input:
        unpack(chunk_inputs),
    output:
        temp(W.CHUNK),
    log:
        "logs/{sub}/{ses}/fit_{model}_{stem}_chunk-{chunk}.log",
    params:
        py=sys.executable,
        b1=b1_option,
        engine=lambda wc: model_option(wc, "engine"),
        unit=lambda wc: model_option(wc, "time_unit"),
        z=lambda wc: "{} {}".format(*PLAN.job(wc.sub, wc.ses, wc.model, wc.stem).slabs[int(wc.chunk)]),
    threads: CFG["fit"]["threads"]
    resources:
        mem_mb=CFG["fit"]["mem_mb"],
        runtime=CFG["fit"]["runtime"],
    shell:
        "{params.py:q} -m pipeline.workflow chunk --model {wildcards.model} "
        "--inputs {input.series:q} {params.b1} --engine {params.engine} "
        "--threads {threads} --time-unit {params.unit} --z {params.z} --out {output:q} "
        "> {log:q} 2>&1"


rule fit:
    input:
        unpack(fit_inputs),
    output:
        W.MANIFEST,
    log:
        "logs/{sub}/{ses}/fit_{model}_{stem}.log",
    params:
        py=sys.executable,
        b1=b1_option,
        engine=lambda wc: model_option(wc, "engine"),
        unit=lambda wc: model_option(wc, "time_unit"),
        outdir=lambda wc, output: os.path.dirname(output[0]),
    threads: CFG["fit"]["threads"]
    resources:
        mem_mb=CFG["fit"]["mem_mb"],
        runtime=CFG["fit"]["runtime"],
    shell:
        "{params.py:q} -m pipeline.workflow fit --model {wildcards.model} "
        "--inputs {input.series:q} {params.b1} --engine {params.engine} "
        "--threads {threads} --time-unit {params.unit} --out {params.outdir:q} "
        "--manifest {output:q} --chunks {input.chunks:q} > {log:q} 2>&1"
