"""frostvane training: consensus labels, synthetic scenes, fitting, evaluation, export."""
