"""The default run: the demo screen (config, screen sheet, layout), inside the package as plateloom.demo_config."""
