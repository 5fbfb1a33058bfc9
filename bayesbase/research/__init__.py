"""Research tools: the method-comparison simulator (:mod:`.compare`)."""
