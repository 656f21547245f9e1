# QC per session (all models' maps against the reference), then the session's rows go
# into the history database (one transaction; a rerun replaces them).


rule qc:
    input:
        unpack(lambda wc: W.qc_inputs(CFG, PLAN, wc)),
    output:
        W.QC_SUMMARY,
    log:
        "logs/{sub}/{ses}/qc.log",
    params:
        settings=lambda wc: W.qc_settings(CFG, PLAN.session(wc.sub, wc.ses)),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        shell(W.step_command("qc", params.settings, input.manifests, output, log))


rule record:
    input:
        W.QC_SUMMARY,
    output:
        W.RECORDED,
    log:
        "logs/{sub}/{ses}/record.log",
    params:
        settings={"database": CFG["history"]["database"]},
    resources:
        mem_mb=500,
        runtime=10,
    run:
        shell(W.step_command("record", params.settings, input, output, log))
