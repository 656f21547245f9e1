include: "pipeline/Snakefile"
