# INPUTS: the sample's image and its calibration record
# OUTPUTS: samples/{sample}/{measured_rings.csv, profile.csv, thumbnail.npy, sample.json}
# The expensive image work; it does not depend on the phase library.


rule measure:
    input:
        image=sample_image,
        calibration=sample_calibration,
    output:
        rings=f"{RESULTS}/samples/{{sample}}/measured_rings.csv",
        profile=f"{RESULTS}/samples/{{sample}}/profile.csv",
        thumbnail=f"{RESULTS}/samples/{{sample}}/thumbnail.npy",
        record=f"{RESULTS}/samples/{{sample}}/sample.json",
    log:
        f"{RESULTS}/logs/samples/{{sample}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/samples/{{sample}}.tsv"
    params:
        outdir=lambda wc: f"{RESULTS}/samples/{wc.sample}",
        max_pixels=config.get("image", {}).get("max_pixels", 67108864),
        extra=lambda wc: sample_options(wc.sample),
    threads: 1
    resources:
        mem_mb=mem("image"),
        runtime=runtime("image"),
    shell:
        "ringid measure {input.image:q}"
        " --calibration {input.calibration:q}"
        " -o {params.outdir:q}"
        " --sample {wildcards.sample:q}"
        " --max-pixels {params.max_pixels}"
        " {params.extra}"
        " > {log:q} 2>&1"
