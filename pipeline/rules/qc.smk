# QC per session (all models' maps against the reference), then the session's rows go
# into the history database (one transaction; a rerun replaces them).


def session_manifests(wc):
    return [j.manifest() for j in PLAN.session(wc.sub, wc.ses).series]


rule qc:
    input:
        session_manifests,
    output:
        W.QC_SUMMARY,
    log:
        "logs/{sub}/{ses}/qc.log",
    params:
        py=sys.executable,
        settings=lambda wc: json.dumps(W.qc_settings(CFG, PLAN.session(wc.sub, wc.ses))),
    resources:
        mem_mb=2000,
        runtime=30,
    shell:
        "{params.py:q} -m pipeline.workflow qc --settings {params.settings:q} "
        "--inputs {input:q} --out {output:q} > {log:q} 2>&1"


rule record:
    input:
        W.QC_SUMMARY,
    output:
        W.RECORDED,
    log:
        "logs/{sub}/{ses}/record.log",
    params:
        py=sys.executable,
        settings=json.dumps({"database": CFG["history"]["database"]}),
    resources:
        mem_mb=500,
        runtime=10,
    shell:
        "{params.py:q} -m pipeline.workflow record --settings {params.settings:q} "
        "--inputs {input:q} --out {output:q} > {log:q} 2>&1"
