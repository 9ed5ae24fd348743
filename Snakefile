# ringid workflow: SAED ring patterns -> phases, sizes, report.
#   snakemake --cores 2                          (the synthetic demo: run `ringid demo` first)
#   snakemake --cores 8 --configfile my.yaml     (your sheets and CIFs)
# Stages (ringid/workflow/rules/): library -> calibration -> batches (image work, then identification,
# batch_size samples per job) -> series (trends) -> report.

import sys
import time
from pathlib import Path

from snakemake.utils import min_version, validate

min_version("8.0")
RUN_STARTED = time.time()  # the end-of-run summary tells a summary of this run from an older one


configfile: "config/config.yaml"


from ringid.jobs.configcheck import config_problems

_problems = config_problems(config, Path(workflow.basedir) / "config" / "config.schema.yaml")
if _problems:
    sys.exit("\n".join(f"ringid: error: {line}" for line in _problems))
validate(config, "config/config.schema.yaml")  # fills the defaults


include: "ringid/workflow/rules/common.smk"
include: "ringid/workflow/rules/library.smk"
include: "ringid/workflow/rules/calibration.smk"
include: "ringid/workflow/rules/batch.smk"
include: "ringid/workflow/rules/series.smk"
include: "ringid/workflow/rules/report.smk"


rule all:
    input:
        f"{RESULTS}/summary.csv",
        f"{RESULTS}/report.html",


onsuccess:
    from ringid.report.summary import run_summary_text

    print(run_summary_text(RESULTS), file=sys.stderr)


onerror:
    from ringid.report.summary import run_summary_text

    print(run_summary_text(RESULTS, since=RUN_STARTED), file=sys.stderr)
    print("ringid: some jobs failed (their logs are named above); samples and phases whose jobs "
          "finished are in the results", file=sys.stderr)
