"""Before any job: the screen sheet and layouts, plate formats, the parse-time plan, checks,
scaffold, job sizing, config."""
