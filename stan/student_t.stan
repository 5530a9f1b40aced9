/*
[candidate]
label   = "Student-t"
about   = "Symmetric outcome with heavier tails than the normal (robust to outliers)"
support = "real"

[candidate.defaults]
intercept_sd   = 2.0   # prior SD of the intercept, in units of y_scale, centred at y_center
coef_sd        = 1.0   # prior SD of each coefficient, in units of y_scale per predictor SD
group_sd_scale = 1.0   # half-normal scale of the SD of group intercepts and of group slopes (per predictor SD), in units of y_scale
sigma_scale    = 1.0   # half-normal scale of the t scale, in units of y_scale
nu_shape       = 2.0   # gamma(2, 0.1) prior on the degrees of freedom (Juarez & Steel 2010)
nu_rate        = 0.1
*/
// Student-t: y ~ student_t(nu, eta, sigma), identity link.
// Reference: SciPy t(df = nu, loc = eta, scale = sigma).
functions {
  // [log F, log(1 - F)] of the Student-t at x. In the tails (|t| >= 1, t = (x - mu) / sigma)
  // the smaller tail is inc_beta(nu / 2, 1 / 2, nu / (nu + t^2)) / 2 (Abramowitz & Stegun
  // 26.7.1 with 26.5.27), computed directly, and the larger one is log1m_exp of it; in the
  // body both probabilities are large and the central incomplete beta serves (the tail
  // form's gradient in nu is not finite at t = 0, where its argument is 1; so is Stan's
  // student_t_lcdf's, measured); t = 0 itself gives 1/2 each
  vector log_cdfs(real x, real nu, real mu, real sigma) {
    real t = (x - mu) / sigma;
    if (t == 0) {
      return [log(0.5), log(0.5)]';
    }
    if (abs(t) < 1) {
      // the body: F = 1/2 + sign(t) inc_beta(1/2, nu / 2, t^2 / (nu + t^2)) / 2
      // (Abramowitz & Stegun 26.7.1 with 26.5.27)
      real half_inner = 0.5 * inc_beta(0.5, 0.5 * nu, square(t) / (nu + square(t)));
      return t > 0 ? [log(0.5 + half_inner), log(0.5 - half_inner)]'
                   : [log(0.5 - half_inner), log(0.5 + half_inner)]';
    }
    real small = log(0.5) + log(inc_beta(0.5 * nu, 0.5, nu / (nu + square(t))));
    if (t > 0) {
      return [log1m_exp(small), small]';
    }
    return [small, log1m_exp(small)]';
  }
  // one draw from the family truncated to the window, by rejection (see window_tries)
  real draw_in_window_rng(real nu, real mu, real sigma, int has_lo, real lo, int has_hi, real hi) {
    real x = 0;
    for (t in 1:window_tries()) {
      x = student_t_rng(nu, mu, sigma);
      if (in_window(x, has_lo, lo, has_hi, hi)) {
        return x;
      }
    }
    return to_window(x, has_lo, lo, has_hi, hi);
  }
  // log_lik of one observation (point_log_lik with this family's terms)
  real obs_log_lik(real y, int cens, real nu, real mu, real sigma,
                   int has_lo, real lo, int has_hi, real hi) {
    return point_log_lik(y, cens,
                         cens == 0 ? student_t_lpdf(y | nu, mu, sigma) : 0,
                         cens != 0 ? log_cdfs(y, nu, mu, sigma) : [0, 0]',
                         has_lo, lo, has_lo ? log_cdfs(lo, nu, mu, sigma) : open_below(),
                         has_hi, hi, has_hi ? log_cdfs(hi, nu, mu, sigma) : open_above());
  }
  // ---- censoring and truncation (the same in every built-in; only log_cdfs differs) ----
  // Log of the family's mass between two points a <= b, from [log F, log(1 - F)] at
  // each: log(F(b) - F(a)) = log(S(a) - S(b)). The survival form is used when a lies
  // above the median, so neither form subtracts two numbers close to 1.
  real log_mass_between(vector at_a, vector at_b) {
    if (at_a[1] > -log2()) {
      return log_diff_exp(at_a[2], at_b[2]);
    }
    return log_diff_exp(at_b[1], at_a[1]);
  }
  // Log likelihood of one observation y: cens 0 its log density, cens 1 right-censored
  // at y (log(F(U) - F(y))), cens -1 left-censored at y (log(F(y) - F(L))), each
  // conditioned on the window (L, U) by subtracting log(F(U) - F(L)). at_y, at_lo,
  // at_hi are [log F, log(1 - F)] at y, L and U; an open side has [-inf, 0] at L and
  // [0, -inf] at U. With cens 0 and no window this is the log density unchanged.
  real point_log_lik(real y, int cens, real log_density, vector at_y,
                     int has_lo, real lo, vector at_lo, int has_hi, real hi, vector at_hi) {
    real lp;
    if ((has_lo && y < lo) || (has_hi && y > hi)) {
      return negative_infinity();          // outside the window: impossible
    }
    if (cens == 0) {
      lp = log_density;
    } else if (cens == 1) {
      lp = has_hi ? log_mass_between(at_y, at_hi) : at_y[2];
    } else {
      lp = has_lo ? log_mass_between(at_lo, at_y) : at_y[1];
    }
    if (has_lo || has_hi) {
      lp -= log_mass_between(at_lo, at_hi);
    }
    return lp;
  }
  // [log F, log(1 - F)] at a window limit, or at an open side
  vector open_below() {
    return [negative_infinity(), 0]';
  }
  vector open_above() {
    return [0, negative_infinity()]';
  }
  // How many of the fitted observations are of one kind (cens value), and their
  // positions within fit_idx
  int count_kind(array[] int cens, array[] int fit_idx, int kind) {
    int n = 0;
    for (i in 1:size(fit_idx)) {
      n += cens[fit_idx[i]] == kind;
    }
    return n;
  }
  array[] int positions_of_kind(array[] int cens, array[] int fit_idx, int kind) {
    array[count_kind(cens, fit_idx, kind)] int at;
    int j = 0;
    for (i in 1:size(fit_idx)) {
      if (cens[fit_idx[i]] == kind) {
        j += 1;
        at[j] = i;
      }
    }
    return at;
  }
  // Censor a replicate at the observation's own censoring point: cens 1 -> min(draw, y),
  // cens -1 -> max(draw, y); an observed value's replicate stays uncensored
  real censor_like(real draw, int cens, real y) {
    if (cens == 1) {
      return fmin(draw, y);
    }
    if (cens == -1) {
      return fmax(draw, y);
    }
    return draw;
  }
  // A rejection draw stays in the window when it falls in it; after MAX_TRIES draws
  // outside (window mass below about 0.5 %: all miss with chance (1 - W)^1000), the
  // replicate is put at the window's edge nearest the last draw.
  int window_tries() {
    return 1000;
  }
  int in_window(real x, int has_lo, real lo, int has_hi, real hi) {
    return (!has_lo || x >= lo) && (!has_hi || x <= hi);
  }
  real to_window(real x, int has_lo, real lo, int has_hi, real hi) {
    if (has_lo && x < lo) {
      return lo;
    }
    if (has_hi && x > hi) {
      return hi;
    }
    return x;
  }
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
  int<lower=0> N;
  vector[N] y;
  int<lower=0> K;
  matrix[N, K] X;
  int<lower=0> J;
  array[N] int<lower=0, upper=J> group;
  int<lower=0> Kz;                         // predictors (columns of X) with a slope per group
  matrix[N, Kz] Z;
  array[N] int<lower=-1, upper=1> cens;    // 0 observed; 1 right-censored at y[n] (true value larger); -1 left-censored at y[n] (true value smaller)
  int<lower=0, upper=1> has_lower_limit;   // truncation window: 0 = open below
  real lower_limit;                        // used only when has_lower_limit = 1
  int<lower=0, upper=1> has_upper_limit;   // 0 = open above
  real upper_limit;                        // used only when has_upper_limit = 1
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
  real y_center;
  real<lower=0> y_scale;
  real<lower=0> intercept_sd;
  real<lower=0> coef_sd;
  real<lower=0> group_sd_scale;
  real<lower=0> sigma_scale;
  real<lower=0> nu_shape;
  real<lower=0> nu_rate;
}
transformed data {
  int has_group = J > 0;
  int slopes = has_group * Kz;
  int windowed = has_lower_limit || has_upper_limit;
  // positions within fit_idx of the observed, right-censored and left-censored values
  array[count_kind(cens, fit_idx, 0)] int at_obs = positions_of_kind(cens, fit_idx, 0);
  array[count_kind(cens, fit_idx, 1)] int at_right = positions_of_kind(cens, fit_idx, 1);
  array[count_kind(cens, fit_idx, -1)] int at_left = positions_of_kind(cens, fit_idx, -1);
}
parameters {
  real intercept;
  vector[K] coef;
  vector[J] group_z;                       // non-centred group intercepts
  vector<lower=0>[has_group] group_sd;
  matrix[slopes, J] slope_z;               // non-centred group slopes
  vector<lower=0>[slopes] slope_sd;
  cholesky_factor_corr[slopes > 0 ? slopes + 1 : 0] group_corr_L;
  real<lower=0> sigma;
  real<lower=1> nu;
}
model {
  // the linear predictor of the fitted observations only: with none fitted (the prior
  // predictive trial) the model block costs next to nothing
  vector[N_fit] eta = linear_predictor(intercept, X[fit_idx], coef, group[fit_idx], group_z, group_sd,
                                       Z[fit_idx], slope_z, slope_sd, group_corr_L);
  intercept ~ normal(y_center, intercept_sd * y_scale);
  coef ~ normal(0, coef_sd * y_scale);
  group_sd ~ normal(0, group_sd_scale * y_scale);
  slope_sd ~ normal(0, group_sd_scale * y_scale);
  sigma ~ normal(0, sigma_scale * y_scale);
  nu ~ gamma(nu_shape, nu_rate);
  group_z ~ std_normal();
  to_vector(slope_z) ~ std_normal();
  if (slopes > 0) {
    group_corr_L ~ lkj_corr_cholesky(2);   // mild pull towards no correlation
  }
  if (windowed) {
    for (i in 1:N_fit) {
      int n = fit_idx[i];
      target += obs_log_lik(y[n], cens[n], nu, eta[i], sigma,
                            has_lower_limit, lower_limit, has_upper_limit, upper_limit);
    }
  } else {
    // no window: the observed values vectorised, the censored ones by their tail terms
    y[fit_idx[at_obs]] ~ student_t(nu, eta[at_obs], sigma);
    for (i in at_right) {
      target += log_cdfs(y[fit_idx[i]], nu, eta[i], sigma)[2];
    }
    for (i in at_left) {
      target += log_cdfs(y[fit_idx[i]], nu, eta[i], sigma)[1];
    }
  }
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep;
  real lprior = normal_lpdf(intercept | y_center, intercept_sd * y_scale)
                + normal_lpdf(coef | 0, coef_sd * y_scale)
                + normal_lpdf(group_sd | 0, group_sd_scale * y_scale)
                + normal_lpdf(slope_sd | 0, group_sd_scale * y_scale)
                + (slopes > 0 ? lkj_corr_cholesky_lpdf(group_corr_L | 2) : 0)
                + normal_lpdf(sigma | 0, sigma_scale * y_scale)
                + gamma_lpdf(nu | nu_shape, nu_rate);
  {
    vector[N] eta = linear_predictor(intercept, X, coef, group, group_z, group_sd,
                                     Z, slope_z, slope_sd, group_corr_L);
    for (n in 1:N) {
      log_lik[n] = obs_log_lik(y[n], cens[n], nu, eta[n], sigma,
                               has_lower_limit, lower_limit, has_upper_limit, upper_limit);
    }
    if (windowed) {
      for (n in 1:N) {
        y_rep[n] = draw_in_window_rng(nu, eta[n], sigma,
                                      has_lower_limit, lower_limit, has_upper_limit, upper_limit);
      }
    } else {
      y_rep = student_t_rng(nu, eta, sigma);
    }
    for (n in 1:N) {
      y_rep[n] = censor_like(y_rep[n], cens[n], y[n]);
    }
  }
}
