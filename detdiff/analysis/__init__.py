"""Analysis stage: accumulate the loss streams into scores, describe items, find causes and suspects."""
