# One-step accuracy of R's HoltWinters on the last third of datasets that ship
# with R, with its parameters fit on the first two thirds ("honest split").
# Run from the repository root:
#
#   Rscript testdata/gen/holtwinters.R
#
# It writes testdata/holtwinters_reference.csv and prints the same table.
# For each series x of length n, n_train = floor(2 n / 3):
#   fit <- HoltWinters(x[1..n_train])             (alpha, beta, gamma by R's optim)
#   all <- HoltWinters(x, alpha, beta, gamma of fit)   (parameters fixed; the
#          start values come from the first periods, the same as in fit)
#   errors e_t = x_t - all$fitted[t, "xhat"] for t > n_train (one-step forecasts)
#   rmse = sqrt(mean(e^2)), mae = mean(|e|)
# co2 and log(AirPassengers) with the additive seasonal model; Nile (annual,
# no season) with gamma = FALSE (Holt's linear method).

hw_split <- function(name, x, seasonal) {
  n <- length(x)
  n_train <- floor(2 * n / 3)
  train <- window(x, end = time(x)[n_train])
  if (seasonal) {
    fit <- HoltWinters(train)
    all <- HoltWinters(x, alpha = fit$alpha, beta = fit$beta, gamma = fit$gamma)
  } else {
    fit <- HoltWinters(train, gamma = FALSE)
    all <- HoltWinters(x, alpha = fit$alpha, beta = fit$beta, gamma = FALSE)
  }
  xhat <- as.numeric(all$fitted[, "xhat"])
  # all$fitted covers the last nrow buckets of x (after the start-up periods).
  first <- n - length(xhat)
  e <- as.numeric(x)[(n_train + 1):n] - xhat[(n_train + 1):n - first]
  data.frame(dataset = name, n = n, n_train = n_train,
             alpha = sprintf("%.17g", fit$alpha), beta = sprintf("%.17g", fit$beta),
             gamma = sprintf("%.17g", if (seasonal) fit$gamma else 0),
             n_errors = length(e), rmse = sprintf("%.17g", sqrt(mean(e^2))),
             mae = sprintf("%.17g", mean(abs(e))))
}

out <- rbind(
  hw_split("co2", datasets::co2, TRUE),
  hw_split("log_airpassengers", log(datasets::AirPassengers), TRUE),
  hw_split("nile", datasets::Nile, FALSE)
)
write.csv(out, "testdata/holtwinters_reference.csv", row.names = FALSE, quote = FALSE)
print(out)
cat(R.version.string, "\n")
