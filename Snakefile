# The relaxline workflow from a clone's root: `snakemake --configfile F -d OUTPUT_DIR`.
# The same as the packaged pipeline/Snakefile (which `relaxline run` uses), lock included.
include: "pipeline/Snakefile"


# An included file's default target does not carry over (Snakemake takes it from the
# main Snakefile), so name it here: without this, a direct run would do nothing.
rule default:
    default_target: True
    input:
        rules.all.input,


localrules:
    default,
