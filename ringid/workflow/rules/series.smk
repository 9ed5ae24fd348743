# INPUTS: per series of the config, the sample and identification records of its members (the
#   samples that give a value of its variable) and the sample sheet
# OUTPUTS: series/{name}.csv and series/{name}.png
# Cheap; rerun when a member's results or the sheet change.

SERIES = {s["name"]: s for s in config["series"]}


def series_inputs(series):
    members = sorted(s for s, row in SAMPLES.items() if row.value(series["variable"]) != "")
    return [f"{RESULTS}/samples/{s}/{name}" for s in members for name in ("sample.json", "identification.json")]


for _name, _series in SERIES.items():

    rule:
        name:
            f"series_{_name}"
        input:
            records=series_inputs(_series),
            sheet=config["samples"],
            index=f"{LIB}/index.csv",
        output:
            table=f"{RESULTS}/series/{_name}.csv",
            figure=f"{RESULTS}/series/{_name}.png",
        log:
            f"{RESULTS}/logs/series/{_name}.log",
        params:
            name=_name,
            variable=_series["variable"],
            group=f"--group-by {_series['group_by']}" if _series.get("group_by") else "",
            end_members=(f"--end-members {' '.join(_series['end_members'])}" if _series.get("end_members")
                         else ""),
        threads: 1
        resources:
            mem_mb=mem("cheap"),
            runtime=runtime("cheap"),
        shell:
            "ringid series {params.name:q} {RESULTS:q}"
            " --samples-sheet {input.sheet:q}"
            " --variable {params.variable}"
            " {params.group} {params.end_members}"
            " > {log:q} 2>&1"
