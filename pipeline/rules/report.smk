# Drift rules over the history, trend figures per vial, the report and status.json
# (from which `relaxline run` takes its exit status). Reruns when a session is added
# or re-recorded.

SESSIONS = [(s.sub, s.ses) for s in PLAN.sessions]


rule report:
    input:
        summaries=[W.QC_SUMMARY.format(sub=a, ses=b) for a, b in SESSIONS],
        recorded=[W.RECORDED.format(sub=a, ses=b) for a, b in SESSIONS],
    output:
        report=W.REPORT,
        status=W.STATUS,
        drift=W.DRIFT,
    log:
        "logs/report.log",
    params:
        py=sys.executable,
        settings=json.dumps(W.report_settings(CFG)),
    resources:
        mem_mb=2000,
        runtime=30,
    shell:
        "{params.py:q} -m pipeline.workflow report --settings {params.settings:q} "
        "--inputs {input.summaries:q} "
        "--out {output.report:q} {output.status:q} {output.drift:q} > {log:q} 2>&1"
