# INPUTS: a measured sample folder and the library index (rebuilt whenever any CIF changes)
# OUTPUTS: samples/{sample}/{phases.csv, rings.csv, identification.json, overview.png}
# Cheap; a rebuilt library re-scores every sample without redoing the image work.


rule identify:
    input:
        rings=f"{RESULTS}/samples/{{sample}}/measured_rings.csv",
        record=f"{RESULTS}/samples/{{sample}}/sample.json",
        profile=f"{RESULTS}/samples/{{sample}}/profile.csv",
        thumbnail=f"{RESULTS}/samples/{{sample}}/thumbnail.npy",
        index=f"{LIB}/index.csv",
    output:
        phases=f"{RESULTS}/samples/{{sample}}/phases.csv",
        rings=f"{RESULTS}/samples/{{sample}}/rings.csv",
        identification=f"{RESULTS}/samples/{{sample}}/identification.json",
        overview=f"{RESULTS}/samples/{{sample}}/overview.png",
    log:
        f"{RESULTS}/logs/identify/{{sample}}.log",
    params:
        outdir=lambda wc: f"{RESULTS}/samples/{wc.sample}",
        window_standard=config["identify"]["dilation_window_standard"],
        window_nominal=config["identify"]["dilation_window_nominal"],
        false_identification_rate=config["identify"]["false_identification_rate"],
    threads: 1
    resources:
        mem_mb=mem("cheap"),
        runtime=runtime("cheap"),
    shell:
        "ringid identify"
        " --sample-dir {params.outdir:q}"
        " --library {LIB:q}"
        " --window-standard {params.window_standard}"
        " --window-nominal {params.window_nominal}"
        " --false-identification-rate {params.false_identification_rate}"
        " > {log:q} 2>&1"
