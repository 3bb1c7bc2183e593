"""Out-of-sample evidence: crops of every object and crop models cross-fitted over folds of images."""
