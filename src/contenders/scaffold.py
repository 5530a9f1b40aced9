"""The template ``contenders new`` writes: a complete candidate that keeps the contract."""

TEMPLATE = """/*
[candidate]
label   = "@LABEL@"
about   = "Describe in one line what this family describes"
support = "positive"        # real | positive | unit | count | binary

[candidate.defaults]
intercept_sd   = 1.5   # prior SD of the log-scale intercept, centred at log(y_center)
coef_sd        = 0.5   # prior SD of each coefficient (log scale, per predictor SD)
group_sd_scale = 0.5   # half-normal scale of the SD of group intercepts and of group slopes (log scale, per predictor SD)
sigma_scale    = 1.0   # half-normal scale of sigma (log scale)
*/
// Starting point: a lognormal with a linear predictor and optional group intercepts and slopes.
// Change the likelihood in the model block, log_lik and y_rep together, and keep:
// the inputs below, y[fit_idx] in the likelihood, and log_lik / y_rep for all N.
functions {
  vector linear_predictor(real intercept, matrix X, vector coef,
                          array[] int group, vector group_z, vector group_sd,
                          matrix Z, matrix slope_z, vector slope_sd, matrix group_corr_L) {
    vector[rows(X)] eta = intercept + X * coef;
    if (num_elements(group_sd) > 0) {
      if (num_elements(slope_sd) > 0) {
        // each group's intercept (row 1) and slopes (rows 2..), correlated, non-centred;
        // row 1 is group_sd[1] * group_z, since the first row of a Cholesky factor of a
        // correlation matrix is (1, 0, ..., 0)
        matrix[rows(group_corr_L), num_elements(group_z)] terms
          = diag_pre_multiply(append_row(group_sd, slope_sd), group_corr_L) * append_row(group_z', slope_z);
        eta += terms[1, group]' + rows_dot_product(Z, terms[2:rows(terms), group]');
      } else {
        eta += group_sd[1] * group_z[group];
      }
    }
    return eta;
  }
}
data {
  int<lower=0> N;                               // observations
  vector[N] y;                                  // outcome
  int<lower=0> K;                               // predictor columns
  matrix[N, K] X;                               // centred predictors
  int<lower=0> J;                               // groups (0: no grouping)
  array[N] int<lower=0, upper=J> group;         // group of each observation
  int<lower=0> Kz;                         // predictors (columns of X) with a slope per group
  matrix[N, Kz] Z;
  int<lower=0, upper=N> N_fit;                  // size of the fit subset
  array[N_fit] int<lower=1, upper=N> fit_idx;   // observations in the likelihood
  real<lower=0> y_center;                       // typical value of y
  real<lower=0> y_scale;                        // typical spread of y
  real<lower=0> intercept_sd;                   // hyperparameters (header defaults)
  real<lower=0> coef_sd;
  real<lower=0> group_sd_scale;
  real<lower=0> sigma_scale;
}
transformed data {
  int has_group = J > 0;
  int slopes = has_group * Kz;
}
parameters {
  real intercept;
  vector[K] coef;
  vector[J] group_z;
  vector<lower=0>[has_group] group_sd;
  matrix[slopes, J] slope_z;               // non-centred group slopes
  vector<lower=0>[slopes] slope_sd;
  cholesky_factor_corr[slopes > 0 ? slopes + 1 : 0] group_corr_L;
  real<lower=0> sigma;
}
model {
  // the linear predictor of the fitted observations only: with none fitted (the prior
  // predictive trial) the model block costs next to nothing
  vector[N_fit] eta = linear_predictor(intercept, X[fit_idx], coef, group[fit_idx], group_z, group_sd,
                                       Z[fit_idx], slope_z, slope_sd, group_corr_L);
  intercept ~ normal(log(y_center), intercept_sd);
  coef ~ normal(0, coef_sd);
  group_z ~ std_normal();
  to_vector(slope_z) ~ std_normal();
  if (slopes > 0) {
    group_corr_L ~ lkj_corr_cholesky(2);   // mild pull towards no correlation
  }
  group_sd ~ normal(0, group_sd_scale);
  slope_sd ~ normal(0, group_sd_scale);
  sigma ~ normal(0, sigma_scale);
  y[fit_idx] ~ lognormal(eta, sigma);
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep;
  real lprior = normal_lpdf(intercept | log(y_center), intercept_sd)
                + normal_lpdf(coef | 0, coef_sd)
                + normal_lpdf(group_sd | 0, group_sd_scale)
                + normal_lpdf(slope_sd | 0, group_sd_scale)
                + (slopes > 0 ? lkj_corr_cholesky_lpdf(group_corr_L | 2) : 0)
                + normal_lpdf(sigma | 0, sigma_scale);
  {
    vector[N] eta = linear_predictor(intercept, X, coef, group, group_z, group_sd,
                                     Z, slope_z, slope_sd, group_corr_L);
    for (n in 1:N) {
      log_lik[n] = lognormal_lpdf(y[n] | eta[n], sigma);
    }
    y_rep = lognormal_rng(eta, sigma);
  }
}
"""
