"""Assessment under Wald's protocol: degrade a reference, magnify it back, compare."""
