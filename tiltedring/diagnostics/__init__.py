"""Where a flat disc in circular rotation fails: harmonics, flow models, the warp decision,
approaching/receding asymmetry and the ring flags. Numerics only: nothing here touches files."""
