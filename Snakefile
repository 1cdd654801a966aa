# plateloom's workflow lives in workflow/ (it ships inside the package, so that `plateloom run`
# works from any folder); this file lets `snakemake --cores 2` run it from the checkout.
include: "workflow/Snakefile"


# an included file's default target is not kept by Snakemake: name it again
workflow.default_target = "all"
