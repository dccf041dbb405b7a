"""What a fit hands on: :class:`.result.FitResult`, the rotation-curve product, map comparison,
figures and the report."""
