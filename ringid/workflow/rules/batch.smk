# Used instead of sample.smk and identify.smk when batch_size > 1: the samples, in sorted id
# order, are cut into consecutive batches of batch_size (ringid.batch.make_batches), and each batch
# is ONE image job and ONE identification job, each running its samples one after another in one
# interpreter. Per-sample files are exactly those of the one-sample rules.
# INPUTS: per batch, its manifest (a sample sheet of its rows), images and calibration records
# OUTPUTS: batches/{batch}.csv; samples/{sample}/... of every sample of the batch
# A killed batch job is redone whole (--rerun-incomplete); a failed sample is recorded, not raised.

from ringid.batch import make_batches, manifest_rows, write_manifest
from ringid.measure import SAMPLE_FILES

BATCHES = make_batches(SAMPLES, config["batch_size"])
IDENTIFY_FILES = ("phases.csv", "rings.csv", "identification.json", "overview.png")


wildcard_constraints:
    batch=r"b[0-9]+",


rule batch_manifest:
    output:
        f"{RESULTS}/batches/{{batch}}.csv",
    params:
        # the batch's sheet rows: a changed note, voltage or membership rewrites the manifest,
        # which reruns that batch only
        rows=lambda wc: manifest_rows(SAMPLES[s] for s in BATCHES[wc.batch]),
    localrule: True
    run:
        write_manifest(output[0], params.rows)


for _batch, _members in BATCHES.items():

    rule:
        name:
            f"measure_{_batch}"
        input:
            manifest=f"{RESULTS}/batches/{_batch}.csv",
            images=[SAMPLES[s].image for s in _members],
            calibrations=sorted({f"{RESULTS}/calibrations/{SAMPLES[s].calibration}.json" for s in _members}),
        output:
            [f"{RESULTS}/samples/{s}/{name}" for s in _members for name in SAMPLE_FILES],
        log:
            f"{RESULTS}/logs/batches/measure_{_batch}.log",
        benchmark:
            f"{RESULTS}/benchmarks/batches/measure_{_batch}.tsv"
        params:
            calibrations=f"{RESULTS}/calibrations",
            samples=f"{RESULTS}/samples",
            max_pixels=config.get("image", {}).get("max_pixels", 67108864),
            extra=image_options(),
        threads: 1
        resources:
            mem_mb=mem("image"),  # one image at a time: the one-sample figure
            runtime=runtime("image") * len(_members),
        shell:
            "ringid batch measure {input.manifest:q}"
            " --calibrations-dir {params.calibrations:q}"
            " -o {params.samples:q}"
            " --max-pixels {params.max_pixels}"
            " {params.extra}"
            " > {log:q} 2>&1"

    rule:
        name:
            f"identify_{_batch}"
        input:
            measured=[f"{RESULTS}/samples/{s}/{name}" for s in _members for name in SAMPLE_FILES],
            index=f"{LIB}/index.csv",
        output:
            [f"{RESULTS}/samples/{s}/{name}" for s in _members for name in IDENTIFY_FILES],
        log:
            f"{RESULTS}/logs/batches/identify_{_batch}.log",
        params:
            dirs=[f"{RESULTS}/samples/{s}" for s in _members],
            window_standard=config.get("identify", {}).get("dilation_window_standard", 0.005),
            window_nominal=config.get("identify", {}).get("dilation_window_nominal", 0.03),
        threads: 1
        resources:
            mem_mb=mem("cheap"),
            runtime=runtime("cheap") * len(_members),
        shell:
            "ringid batch identify {params.dirs:q}"
            " --library {LIB:q}"
            " --window-standard {params.window_standard}"
            " --window-nominal {params.window_nominal}"
            " > {log:q} 2>&1"
