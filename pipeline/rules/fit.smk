# Fit jobs: one per (session, model, series). Volumes above fit.chunk_voxels are split
# into z-slab chunk jobs whose results the fit job gathers (maps identical to an
# unsplit fit). Each job runs `python -m pipeline.workflow STEP` in its own process.


rule fit_chunk:
    input:
        unpack(lambda wc: W.fit_inputs(CFG, PLAN, wc, chunks=False)),
    output:
        temp(W.CHUNK),
    log:
        "logs/{sub}/{ses}/fit_{model}_{stem}_chunk-{chunk}.log",
    params:
        fit=lambda wc: W.fit_params(CFG, wc.model, wc.stem),
    threads: lambda wc: W.fit_threads(CFG, PLAN, wc)
    resources:
        mem_mb=CFG["fit"]["mem_mb"],
        runtime=CFG["fit"]["runtime"],
    run:
        shell(W.fit_command(CFG, PLAN, "chunk", wildcards, input, output, threads, log))


rule fit:
    input:
        unpack(lambda wc: W.fit_inputs(CFG, PLAN, wc)),
    output:
        W.MANIFEST,
    log:
        "logs/{sub}/{ses}/fit_{model}_{stem}.log",
    params:
        fit=lambda wc: W.fit_params(CFG, wc.model, wc.stem),
    threads: lambda wc: W.fit_threads(CFG, PLAN, wc)
    resources:
        mem_mb=CFG["fit"]["mem_mb"],
        runtime=CFG["fit"]["runtime"],
    run:
        shell(W.fit_command(CFG, PLAN, "fit", wildcards, input, output, threads, log))
