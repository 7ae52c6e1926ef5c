"""Read click logs, sessionise, filter and split them by time into a prepared data set."""
