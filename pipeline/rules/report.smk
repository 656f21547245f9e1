# Drift rules over the history, trend figures per vial, the report and status.json
# (from which `relaxline run` takes its exit status). Reruns when a session is added
# or re-recorded.


rule report:
    input:
        summaries=[W.QC_SUMMARY.format(sub=s.sub, ses=s.ses) for s in PLAN.sessions],
        recorded=[W.RECORDED.format(sub=s.sub, ses=s.ses) for s in PLAN.sessions],
    output:
        report=W.REPORT,
        status=W.STATUS,
        drift=W.DRIFT,
    log:
        "logs/report.log",
    params:
        settings=W.report_settings(CFG),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        shell(W.step_command("report", params.settings, input.summaries, output, log))
