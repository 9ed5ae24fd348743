# INPUTS: every sample's identification, every calibration, the library index
# OUTPUTS: summary.csv, report.html


rule report:
    input:
        identified=expand(f"{RESULTS}/samples/{{sample}}/identification.json", sample=sorted(SAMPLES)),
        overviews=expand(f"{RESULTS}/samples/{{sample}}/overview.png", sample=sorted(SAMPLES)),
        calibrations=expand(f"{RESULTS}/calibrations/{{calibration}}.json", calibration=sorted(CALIBRATIONS)),
        index=f"{LIB}/index.csv",
        samples_sheet=config["samples"],
        calibrations_sheet=config["calibrations"],
        series=[f"{RESULTS}/series/{name}.{ext}" for name in SERIES for ext in ("csv", "png")],
    output:
        summary=f"{RESULTS}/summary.csv",
        report=f"{RESULTS}/report.html",
    log:
        f"{RESULTS}/logs/report.log",
    params:
        figures=config["report"]["figures"],
        series=" ".join(SERIES),
    threads: 1
    resources:
        mem_mb=mem("cheap"),
        runtime=runtime("cheap"),
    shell:
        "ringid report {RESULTS:q}"
        " --samples-sheet {input.samples_sheet:q}"
        " --calibrations-sheet {input.calibrations_sheet:q}"
        " --figures {params.figures}"
        " --series {params.series}"
        " > {log:q} 2>&1"
