/*
[candidate]
label   = "Skew-normal"
about   = "Unbounded outcome with asymmetric spread (location, scale and slant)"
support = "real"

[candidate.defaults]
intercept_sd   = 2.0   # prior SD of the location intercept, in units of y_scale, centred at y_center
coef_sd        = 1.0   # prior SD of each coefficient, in units of y_scale per predictor SD
group_sd_scale = 1.0   # half-normal scale of the SD of group intercepts and of group slopes (per predictor SD), in units of y_scale
omega_scale    = 1.5   # half-normal scale of the skew-normal scale, in units of y_scale
slant_sd       = 4.0   # prior SD of the slant (0 is the normal; positive skews right)
*/
// Skew-normal: y ~ skew_normal(eta, omega, slant), eta is the location (not the mean).
// Reference: SciPy skewnorm(a = slant, loc = eta, scale = omega).
functions {
  // 16-point Gauss-Laguerre rule (nodes, weights) for the integral of exp(-s) g(s) over s > 0
  vector laguerre_nodes() {
    return [0.08764941047892784, 0.46269632891508083, 1.141057774831227, 2.129283645098381,
            3.4370866338932067, 5.078018614549768, 7.070338535048235, 9.438314336391938,
            12.21422336886616, 15.441527368781617, 19.180156856753136, 23.515905693991908,
            28.57872974288214, 34.58339870228662, 41.94045264768833, 51.70116033954332]';
  }
  vector laguerre_weights() {
    return [0.20615171495780069, 0.331057854950884, 0.26579577764421436, 0.13629693429637774,
            0.04732892869412522, 0.01129990008033945, 0.0018490709435263094, 0.00020427191530827824,
            1.4844586873981333e-05, 6.828319330871246e-07, 1.8810248410796997e-08, 2.8623502429738586e-10,
            2.1270790332240987e-12, 6.297967002517801e-15, 5.0504737000355466e-18, 4.161462370372804e-22]';
  }
  // [log F, log(1 - F)] of the standard skew-normal (location 0, scale 1) at z for a
  // slant a >= 0, with Owen's T function T: 1 - F(z) = Phi(-z) + 2 T(z, a) (two
  // positive terms) and F(z) = Phi(z) - 2 T(z, a), taken from the survival form while
  // F > 1/2. In the light left tail (z < 0, a^2 z^2 / 2 > 4.5) that difference loses
  // every digit, so F is taken from Owen's integral instead (T(z, inf) = Phi(z) / 2 for
  // z < 0; Owen 1956, Ann. Math. Statist. 27, 1075-1090):
  //   F(z) = 2 (T(z, inf) - T(z, a))
  //        = exp(-(1 + a^2) z^2 / 2) / (2 pi) * int_0^inf exp(-w z^2 / 2) / (sqrt(a^2 + w) (1 + a^2 + w)) dw,
  // a Laplace transform of a smooth function, by the 16-point Gauss-Laguerre rule
  // (relative error below 1e-12 where it is used, against adaptive quadrature).
  vector std_skew_log_cdfs(real z, real a) {
    if (z < 0 && square(a * z) / 2 > 4.5) {
      real rate = square(z) / 2;
      vector[16] w = laguerre_nodes() / rate;
      real integral = dot_product(laguerre_weights(),
                                  inv(sqrt(square(a) + w) .* (1 + square(a) + w))) / rate;
      real log_cdf = -(1 + square(a)) * rate - log(2 * pi()) + log(integral);
      return [log_cdf, log1m_exp(log_cdf)]';
    }
    if (abs(z) > 30) {
      // Far out in either tail Owen's T underflows (below 1e-308 beyond |z| of about 38),
      // and log(owens_t) has neither a value nor a gradient there. With x = z + s / z the
      // tail beyond z, 2 int phi(x) Phi(a x) dx, is
      //   2 phi(z) / |z| * int_0^inf exp(-s) exp(-s^2 / (2 z^2)) Phi(a (z + s / z)) ds,
      // a smooth integrand for |z| > 30 (Phi stays above Phi(-3.2): a |z| <= 3 here when
      // z < 0), by the same 16-point Gauss-Laguerre rule.
      vector[16] s = laguerre_nodes();
      real g = dot_product(laguerre_weights(),
                           exp(-square(s / z) / 2) .* Phi(a * (z + s / z)));
      real log_tail = log2() - square(z) / 2 - 0.5 * log(2 * pi()) - log(abs(z)) + log(g);
      if (z > 0) {
        return [log1m_exp(log_tail), log_tail]';
      }
      return [log_tail, log1m_exp(log_tail)]';
    }
    real t = log2() + log(owens_t(z, a));
    real log_sf = fmin(log_sum_exp(std_normal_lcdf(-z), t), 0);
    real log_cdf = log_sf < -log2() ? log1m_exp(log_sf) : log_diff_exp(std_normal_lcdf(z), t);
    return [log_cdf, log_sf]';
  }
  // [log F, log(1 - F)] of skew_normal(xi, omega, slant) at x; a negative slant by the
  // mirror image (-X is skew-normal with slant -slant), so the heavy tail is always the
  // one summed from positive terms. Stan's skew_normal_lcdf / _lccdf are not used: they
  // form 1 - F outside log space.
  vector log_cdfs(real x, real xi, real omega, real slant) {
    real z = (x - xi) / omega;
    if (slant >= 0) {
      return std_skew_log_cdfs(z, slant);
    }
    vector[2] mirrored = std_skew_log_cdfs(-z, -slant);
    return [mirrored[2], mirrored[1]]';
  }
  // one draw from the family truncated to the window, by rejection (see window_tries)
  real draw_in_window_rng(real xi, real omega, real slant, int has_lo, real lo, int has_hi, real hi) {
    real x = 0;
    for (t in 1:window_tries()) {
      x = skew_normal_rng(xi, omega, slant);
      if (in_window(x, has_lo, lo, has_hi, hi)) {
        return x;
      }
    }
    return to_window(x, has_lo, lo, has_hi, hi);
  }
  // log_lik of one observation (point_log_lik with this family's terms)
  real obs_log_lik(real y, int cens, real xi, real omega, real slant,
                   int has_lo, real lo, int has_hi, real hi) {
    return point_log_lik(y, cens,
                         cens == 0 ? skew_normal_lpdf(y | xi, omega, slant) : 0,
                         cens != 0 ? log_cdfs(y, xi, omega, slant) : [0, 0]',
                         has_lo, lo, has_lo ? log_cdfs(lo, xi, omega, slant) : open_below(),
                         has_hi, hi, has_hi ? log_cdfs(hi, xi, omega, slant) : open_above());
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
  real<lower=0> omega_scale;
  real<lower=0> slant_sd;
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
  real<lower=0> omega;
  real slant;
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
  omega ~ normal(0, omega_scale * y_scale);
  slant ~ normal(0, slant_sd);
  group_z ~ std_normal();
  to_vector(slope_z) ~ std_normal();
  if (slopes > 0) {
    group_corr_L ~ lkj_corr_cholesky(2);   // mild pull towards no correlation
  }
  if (windowed) {
    for (i in 1:N_fit) {
      int n = fit_idx[i];
      target += obs_log_lik(y[n], cens[n], eta[i], omega, slant,
                            has_lower_limit, lower_limit, has_upper_limit, upper_limit);
    }
  } else {
    // no window: the observed values vectorised, the censored ones by their tail terms
    y[fit_idx[at_obs]] ~ skew_normal(eta[at_obs], omega, slant);
    for (i in at_right) {
      target += log_cdfs(y[fit_idx[i]], eta[i], omega, slant)[2];
    }
    for (i in at_left) {
      target += log_cdfs(y[fit_idx[i]], eta[i], omega, slant)[1];
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
                + normal_lpdf(omega | 0, omega_scale * y_scale)
                + normal_lpdf(slant | 0, slant_sd);
  {
    vector[N] eta = linear_predictor(intercept, X, coef, group, group_z, group_sd,
                                     Z, slope_z, slope_sd, group_corr_L);
    for (n in 1:N) {
      log_lik[n] = obs_log_lik(y[n], cens[n], eta[n], omega, slant,
                               has_lower_limit, lower_limit, has_upper_limit, upper_limit);
    }
    if (windowed) {
      for (n in 1:N) {
        y_rep[n] = draw_in_window_rng(eta[n], omega, slant,
                                      has_lower_limit, lower_limit, has_upper_limit, upper_limit);
      }
    } else {
      y_rep = skew_normal_rng(eta, omega, slant);
    }
    for (n in 1:N) {
      y_rep[n] = censor_like(y_rep[n], cens[n], y[n]);
    }
  }
}
