"""Scripts run by hand that print figures (speed, memory, quality); none is collected as a test."""
