"""The job functions that scripts/<rule>.py call, one module per family of rules."""
