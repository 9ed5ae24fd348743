# INPUTS: calibration sheet row (+ standard film image and the standard's ring list)
# OUTPUTS: calibrations/{calibration}.json (status ok or failed with its reason; a job that died is
#   recorded as failed by its own command with --after-crash)


rule calibration:
    input:
        unpack(calibration_inputs),
        sheet=config["calibrations"],
    output:
        f"{RESULTS}/calibrations/{{calibration}}.json",
    log:
        f"{RESULTS}/logs/calibrations/{{calibration}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/calibrations/{{calibration}}.tsv"
    params:
        image=image_options(ring_search=False),  # the samples' saturation level, frame, floor and mask
    threads: 1
    resources:
        mem_mb=mem("image"),
        runtime=runtime("image"),
    shell:
        "ringid calibration {wildcards.calibration:q}"
        " --calibrations-sheet {input.sheet:q}"
        " --library {LIB:q}"
        " -o {output:q}"
        " {params.image}"
        " > {log:q} 2>&1"
        " || {{ status=$?; ringid calibration {wildcards.calibration:q} --calibrations-sheet {input.sheet:q} -o {output:q}"
        " --after-crash $status --log {log:q} >> {log:q} 2>&1; }}"
