# ringid workflow: SAED ring patterns -> phases, sizes, report.
#   snakemake --cores 2                          (the synthetic demo: run `ringid demo` first)
#   snakemake --cores 8 --configfile my.yaml     (your sheets and CIFs)
# Stages (ringid/workflow/rules/): library -> calibration -> batches (image work, then identification,
# batch_size samples per job) -> report.

import sys
from pathlib import Path

from snakemake.utils import min_version, validate

min_version("8.0")


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
include: "ringid/workflow/rules/report.smk"


rule all:
    input:
        f"{RESULTS}/summary.csv",
        f"{RESULTS}/report.html",
