"""The Snakemake workflow (Snakefile, rules, schemas, entry scripts), shipped inside the package
as plateloom.workflow."""
