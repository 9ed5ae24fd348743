# INPUTS: phases_dir/{phase}.cif   OUTPUTS: library/{phases,rings,reflections}/{phase}.*, library/index.csv
# One job per CIF, so a new or changed CIF recomputes only its phase. A job that dies (killed for
# memory, say) is followed by its own command with --after-crash, which records the phase as failed.


rule library_phase:
    input:
        cif=f"{PHASES_DIR}/{{phase}}.cif",
    output:
        record=f"{LIB}/phases/{{phase}}.json",
        rings=f"{LIB}/rings/{{phase}}.csv",
        reflections=f"{LIB}/reflections/{{phase}}.csv",
    log:
        f"{RESULTS}/logs/library/{{phase}}.log",
    params:
        d_min=config["library"]["d_min_angstrom"],
        tol=config["library"]["merge_tolerance"],
        max_refl=config["library"]["max_reflections"],
    threads: 1
    resources:
        mem_mb=mem("cheap"),
        runtime=runtime("cheap"),
    shell:
        "ringid library phase {input.cif:q}"
        " -o {LIB:q}"
        " --d-min-angstrom {params.d_min}"
        " --merge-tolerance {params.tol}"
        " --max-reflections {params.max_refl}"
        " > {log:q} 2>&1"
        " || {{ status=$?; ringid library phase {input.cif:q} -o {LIB:q} --d-min-angstrom {params.d_min}"
        " --merge-tolerance {params.tol} --after-crash $status --log {log:q} >> {log:q} 2>&1; }}"


rule library_index:
    input:
        expand(f"{LIB}/phases/{{phase}}.json", phase=PHASES),
    output:
        f"{LIB}/index.csv",
    log:
        f"{RESULTS}/logs/library/index.log",
    params:
        phases=PHASES,
    threads: 1
    resources:
        mem_mb=mem("cheap"),
        runtime=runtime("cheap"),
    shell:
        "ringid library index {LIB:q}"
        " --phases {params.phases:q}"
        " > {log:q} 2>&1"
