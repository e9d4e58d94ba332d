# Reference values for discounted least squares, computed with R's lm on
# datasets that ship with R (package datasets). Run from the repository root:
#
#   Rscript testdata/gen/dls_reference.R
#
# It writes the series it used (testdata/series/*.csv) and the expected fits
# (testdata/dls_reference.csv). See testdata/README.md for the columns.

out_dir <- "testdata"
dir.create(file.path(out_dir, "series"), showWarnings = FALSE)

fmt <- function(x) sprintf("%.17g", x)     # round-trips every double
fmt_param <- function(x) format(x, digits = 15)

# Export a series: one row per bucket, NA written as an empty value.
export <- function(name, y) {
  v <- ifelse(is.na(y), "", fmt(y))
  writeLines(c("bucket,value", paste(seq_along(y), v, sep = ",")),
             file.path(out_dir, "series", paste0(name, ".csv")))
}

# Regressors f(j): 1, j, j^2/2!, j^3/3! up to the degree, then for each
# harmonic k the pair sin(k w j), cos(k w j), or only cos at period/2.
regressors <- function(j, degree, period, harmonics) {
  cols <- list()
  for (i in 0:degree) cols[[length(cols) + 1]] <- j^i / factorial(i)
  if (harmonics > 0) for (k in 1:harmonics) {
    a <- 2 * pi * k * j / period
    if (2 * k != period) cols[[length(cols) + 1]] <- sin(a)
    cols[[length(cols) + 1]] <- cos(a)
  }
  do.call(cbind, cols)
}

series <- list(
  nile = as.numeric(Nile),
  co2 = as.numeric(co2),
  airpassengers = as.numeric(AirPassengers),
  sunspots = as.numeric(sunspot.year)
)
# Nile with buckets left without a value (gaps), at 1-based positions
# chosen by hand: a single gap, a run of three and a gap just before the end.
nile_gaps <- series$nile
nile_gaps[c(12, 30, 31, 32, 61, 97)] <- NA
series$nile_gaps <- nile_gaps
for (nm in names(series)) export(nm, series[[nm]])

cases <- list(
  list(series = "nile", degree = 0, period = 0, harmonics = 0, lambda = 0.8, n = c(10, 100)),
  list(series = "nile", degree = 1, period = 0, harmonics = 0, lambda = 0.9, n = c(20, 50, 100)),
  list(series = "nile", degree = 1, period = 0, harmonics = 0, lambda = 0.95, n = c(20, 50, 100)),
  list(series = "nile", degree = 1, period = 0, harmonics = 0, lambda = 1, n = c(20, 100)),
  list(series = "nile", degree = 2, period = 0, harmonics = 0, lambda = 0.97, n = c(30, 100)),
  list(series = "nile_gaps", degree = 1, period = 0, harmonics = 0, lambda = 0.95, n = c(33, 98, 100)),
  list(series = "co2", degree = 1, period = 12, harmonics = 2, lambda = 0.97, n = c(60, 240, 468)),
  list(series = "co2", degree = 1, period = 12, harmonics = 2, lambda = 0.99, n = c(120, 468)),
  list(series = "co2", degree = 2, period = 12, harmonics = 6, lambda = 0.99, n = c(120, 468)),
  list(series = "airpassengers", degree = 1, period = 12, harmonics = 3, lambda = 0.95, n = c(48, 144)),
  list(series = "sunspots", degree = 0, period = 11.1, harmonics = 2, lambda = 0.98, n = c(100, 289))
)

H <- 12
rows <- character(0)
add <- function(id, c, n, quantity, index, value) {
  rows[[length(rows) + 1]] <<- paste(id, c$series, c$degree, fmt_param(c$period), c$harmonics,
                                     fmt_param(c$lambda), n, quantity, index, fmt(value), sep = ",")
}
id <- 0
for (c in cases) for (n in c$n) {
  id <- id + 1
  y <- series[[c$series]][1:n]
  age <- n - seq_len(n)          # age in buckets, gaps included
  w <- c$lambda^age
  X <- regressors(-age, c$degree, c$period, c$harmonics)
  p <- ncol(X)
  fit <- lm(y ~ X - 1, weights = w)          # NA rows are dropped
  stopifnot(fit$rank == p)
  theta <- unname(coef(fit))
  obs <- !is.na(y)
  S <- sum(w[obs] * residuals(fit)^2)
  T <- sum(w[obs])
  sigma <- sqrt(S / (T - p))
  V <- summary(fit)$cov.unscaled            # (X^T W X)^-1
  add(id, c, n, "S", 0, S)
  add(id, c, n, "T", 0, T)
  add(id, c, n, "sigma", 0, sigma)
  for (k in 1:p) add(id, c, n, "theta", k, theta[k])
  if (c$degree >= 1) add(id, c, n, "slope_se", 0, sigma * sqrt(V[2, 2]))
  cum <- rep(0, p)
  cumy <- 0
  for (l in 1:H) {
    f <- as.numeric(regressors(l, c$degree, c$period, c$harmonics))
    forecast <- sum(f * theta)
    cum <- cum + f
    cumy <- cumy + forecast
    add(id, c, n, "forecast", l, forecast)
    add(id, c, n, "se", l, sigma * sqrt(1 + drop(t(f) %*% V %*% f)))
    add(id, c, n, "cum", l, cumy)
    add(id, c, n, "cum_se", l, sigma * sqrt(l + drop(t(cum) %*% V %*% cum)))
  }
}
writeLines(c("case,series,degree,period,harmonics,lambda,n,quantity,index,value", rows),
           file.path(out_dir, "dls_reference.csv"))
cat(sprintf("wrote %d cases, %d values\n", id, length(rows)))
