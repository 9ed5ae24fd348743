# The per-sample stages. The samples, in sorted id order, are cut into consecutive batches of
# batch_size (ringid.jobs.batch.make_batches; a batch of one is named after its sample), and each
# batch is ONE image job and ONE identification job, each running its samples one after another in
# one interpreter. Per-sample files do not depend on batch_size.
# INPUTS: per batch, its images and calibration records (image job); its measured samples and the
#   library index (identification job)
# OUTPUTS: samples/{sample}/{measured_rings.csv, profile.csv, thumbnail.npy, sample.json} (image job),
#   samples/{sample}/{phases.csv, rings.csv, identification.json, overview.png} (identification job)
# A killed batch job is redone whole (--rerun-incomplete); a failed sample is recorded, not raised.
# Each job prints one line per sample as it finishes, to its log and to the terminal. A job that
# dies (killed for memory, say) is followed by its own command with --after-crash, which records
# every sample it left unwritten as failed with the reason, so the report is still written.
# The batch's manifest (its sample-sheet rows) is a parameter, fed to the job on stdin: a changed
# note, voltage, elements or membership reruns that batch only, and no extra job writes a file for it. A
# rebuilt library reruns the identification jobs only. Both jobs of a batch are in the group
# "per_batch": on a cluster they can share one scheduler job (--group-components per_batch=N).

from ringid.jobs.batch import make_batches, manifest_text
from ringid.jobs.measure import SAMPLE_FILES

BATCHES = make_batches(SAMPLES, config["batch_size"])
IDENTIFY_FILES = ("phases.csv", "rings.csv", "identification.json", "overview.png")


for _batch, _members in BATCHES.items():

    rule:
        name:
            f"measure_{_batch}"
        input:
            images=[SAMPLES[s].image for s in _members],
            calibrations=sorted({f"{RESULTS}/calibrations/{SAMPLES[s].calibration}.json" for s in _members}),
        output:
            [f"{RESULTS}/samples/{s}/{name}" for s in _members for name in SAMPLE_FILES],
        log:
            f"{RESULTS}/logs/batches/measure_{_batch}.log",
        benchmark:
            f"{RESULTS}/benchmarks/batches/measure_{_batch}.tsv"
        params:
            manifest=manifest_text(SAMPLES[s] for s in _members),
            calibrations=f"{RESULTS}/calibrations",
            samples=f"{RESULTS}/samples",
            max_pixels=config["image"]["max_pixels"],
            extra=image_options(),
        group:
            "per_batch"
        threads: 1
        resources:
            mem_mb=mem("image"),  # one image at a time: the one-sample figure
            runtime=runtime("image") * len(_members),
        shell:
            "printf '%s' {params.manifest:q} | ringid batch measure -"
            " --calibrations-dir {params.calibrations:q}"
            " -o {params.samples:q}"
            " --max-pixels {params.max_pixels}"
            " {params.extra}"
            " 2>&1 | tee {log:q}"
            " || {{ status=$?; printf '%s' {params.manifest:q} | ringid batch measure -"
            " --calibrations-dir {params.calibrations:q} -o {params.samples:q}"
            " --after-crash $status --log {log:q} 2>&1 | tee -a {log:q}; }}"

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
            window_standard=config["identify"]["dilation_window_standard"],
            window_nominal=config["identify"]["dilation_window_nominal"],
            false_identification_rate=config["identify"]["false_identification_rate"],
        group:
            "per_batch"
        threads: 1
        resources:
            mem_mb=mem("cheap"),
            runtime=runtime("cheap") * len(_members),
        shell:
            "ringid batch identify {params.dirs:q}"
            " --library {LIB:q}"
            " --window-standard {params.window_standard}"
            " --window-nominal {params.window_nominal}"
            " --false-identification-rate {params.false_identification_rate}"
            " 2>&1 | tee {log:q}"
            " || {{ status=$?; ringid batch identify {params.dirs:q} --library {LIB:q}"
            " --after-crash $status --log {log:q} 2>&1 | tee -a {log:q}; }}"
