-- Every period's effects linked from the portfolio's first period through that period (the
-- prefix of the record linked on its own) by the method in run_options.linking. Each one
-- reconciles exactly: the linked effects add up to prod(1 + r_t) - prod(1 + b_t). With r_t,
-- b_t the period's linked and policy returns, e_t an effect, d_t = r_t - b_t, R and B the
-- cumulative returns through tau and n the number of periods:
--   'carino'   (Carino 1999, J. Performance Measurement 3(4)): E = sum_t k_t e_t / k with
--              k_t = ln((1 + r_t)/(1 + b_t)) / (r_t - b_t), k the same of R and B
--              (limit 1/(1 + b) at r = b);
--   'menchero' (Menchero 2000, J. Performance Measurement, Fall): E = sum_t (M + c d_t) e_t,
--              M = [(R - B)/n] / [(1 + R)^(1/n) - (1 + B)^(1/n)] (limit (1 + B)^((n-1)/n)),
--              c = (R - B - M sum d_t) / sum d_t^2 (0 when every d_t is 0);
--   'grap', 'frongello' (GRAP 1997; Frongello 2002, J. Performance Measurement 6(3); the
--              same cumulative totals): E = Q_tau sum_t e_t P_(t-1) / Q_t with
--              P_t = prod_(s<=t) (1 + r_s) and Q_t = prod_(s<=t) (1 + b_s).
-- Products are exp(sum ln(1 + x)). ln(1 + x) is taken as ln(u) x / (u - 1) with u = 1 + x
-- rounded, and ln(1 + x)/x as ln(u)/(u - 1) (Goldberg 1991, "What every computer scientist
-- should know about floating-point arithmetic", ACM Computing Surveys 23(1), Theorem 4);
-- exp(y) - 1 as (v - 1) y / ln(v) with v = exp(y) (Kahan's companion trick, as given in
-- Higham 2002, "Accuracy and Stability of Numerical Algorithms", 2nd ed., section 1.14.1;
-- both references from memory), so no digits are lost near 0. A null effect (selection or
-- interaction unknown) counts as 0 in the sums and stays null.
with periods as (
    select * from int_periods_totalled
),

run_options as (
    select * from stg_run_options
),

base as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        portfolio_return - policy_return as return_gap,
        1 + portfolio_return as growth_portfolio,
        1 + policy_return as growth_policy,
        1 + (portfolio_return - policy_return) / (1 + policy_return) as growth_ratio
    from periods
),

per_period as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        return_gap,
        case
            when growth_portfolio <= 0 then cast(null as double)
            when growth_portfolio = 1 then portfolio_return
            else ln(growth_portfolio) * portfolio_return / (growth_portfolio - 1)
        end as log_growth_portfolio,
        case
            when growth_policy <= 0 then cast(null as double)
            when growth_policy = 1 then policy_return
            else ln(growth_policy) * policy_return / (growth_policy - 1)
        end as log_growth_policy,
        case
            when growth_ratio <= 0 then cast(null as double)
            when growth_ratio = 1 then 1 / growth_policy
            else ln(growth_ratio) / (growth_ratio - 1) / growth_policy
        end as carino_period_coefficient
    from base
),

cumulated as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        row_number() over (partition by portfolio_id order by period_index) as period_number,
        count(*) over (partition by portfolio_id) as n_periods,
        sum(log_growth_portfolio) over through_current as cum_log_portfolio,
        sum(log_growth_policy) over through_current as cum_log_policy,
        coalesce(sum(log_growth_portfolio) over before_current, 0) as cum_log_portfolio_before,
        sum(return_gap) over through_current as sum_gap,
        sum(return_gap * return_gap) over through_current as sum_gap_squared,
        sum(coalesce(static_allocation, 0)) over through_current as sum_static_allocation,
        sum(coalesce(timing, 0)) over through_current as sum_timing,
        sum(coalesce(selection, 0)) over through_current as sum_selection,
        sum(coalesce(interaction, 0)) over through_current as sum_interaction,
        sum(coalesce(residual, 0)) over through_current as sum_residual,
        sum(return_gap * coalesce(static_allocation, 0)) over through_current
        as sum_gap_static_allocation,
        sum(return_gap * coalesce(timing, 0)) over through_current as sum_gap_timing,
        sum(return_gap * coalesce(selection, 0)) over through_current as sum_gap_selection,
        sum(return_gap * coalesce(interaction, 0)) over through_current as sum_gap_interaction,
        sum(return_gap * coalesce(residual, 0)) over through_current as sum_gap_residual,
        sum(carino_period_coefficient * coalesce(static_allocation, 0)) over through_current
        as sum_carino_static_allocation,
        sum(carino_period_coefficient * coalesce(timing, 0)) over through_current
        as sum_carino_timing,
        sum(carino_period_coefficient * coalesce(selection, 0)) over through_current
        as sum_carino_selection,
        sum(carino_period_coefficient * coalesce(interaction, 0)) over through_current
        as sum_carino_interaction,
        sum(carino_period_coefficient * coalesce(residual, 0)) over through_current
        as sum_carino_residual
    from per_period
    window
        through_current as (
            partition by portfolio_id
            order by period_index
            rows between unbounded preceding and current row
        ),
        before_current as (
            partition by portfolio_id
            order by period_index
            rows between unbounded preceding and 1 preceding
        )
),

grown as (
    select
        portfolio_id,
        period_index,
        period_number,
        n_periods,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        cum_log_portfolio,
        cum_log_policy,
        sum_gap,
        sum_gap_squared,
        sum_static_allocation,
        sum_timing,
        sum_selection,
        sum_interaction,
        sum_residual,
        sum_gap_static_allocation,
        sum_gap_timing,
        sum_gap_selection,
        sum_gap_interaction,
        sum_gap_residual,
        sum_carino_static_allocation,
        sum_carino_timing,
        sum_carino_selection,
        sum_carino_interaction,
        sum_carino_residual,
        exp(cum_log_portfolio) - 1 as cum_portfolio_return,
        exp(cum_log_policy) - 1 as cum_policy_return,
        exp(cum_log_policy) as policy_growth,
        exp(cum_log_portfolio_before - cum_log_policy) as grap_period_weight,
        cum_log_portfolio - cum_log_policy as log_ratio,
        exp(cum_log_portfolio - cum_log_policy) as growth_ratio,
        exp((cum_log_portfolio - cum_log_policy) / cast(period_number as double))
        as growth_ratio_per_period
    from cumulated
),

coefficients as (
    select
        portfolio_id,
        period_index,
        period_number,
        n_periods,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        cum_log_portfolio,
        cum_log_policy,
        cum_portfolio_return,
        cum_policy_return,
        policy_growth,
        sum_gap,
        sum_gap_squared,
        sum_static_allocation,
        sum_timing,
        sum_selection,
        sum_interaction,
        sum_residual,
        sum_gap_static_allocation,
        sum_gap_timing,
        sum_gap_selection,
        sum_gap_interaction,
        sum_gap_residual,
        sum_carino_static_allocation,
        sum_carino_timing,
        sum_carino_selection,
        sum_carino_interaction,
        sum_carino_residual,
        sum(grap_period_weight * coalesce(static_allocation, 0)) over through_current
        as sum_grap_static_allocation,
        sum(grap_period_weight * coalesce(timing, 0)) over through_current as sum_grap_timing,
        sum(grap_period_weight * coalesce(selection, 0)) over through_current
        as sum_grap_selection,
        sum(grap_period_weight * coalesce(interaction, 0)) over through_current
        as sum_grap_interaction,
        sum(grap_period_weight * coalesce(residual, 0)) over through_current
        as sum_grap_residual,
        -- k = ln((1 + R)/(1 + B)) / (R - B) = [ln(v)/(v - 1)] / (1 + B), v = (1 + R)/(1 + B)
        case
            when growth_ratio = 1 then 1 / policy_growth
            else ln(growth_ratio) / (growth_ratio - 1) / policy_growth
        end as carino_coefficient,
        -- Menchero's M = expm1(l) / (n expm1(l / n)) (1 + B)^((n - 1)/n), l = ln(v)
        case
            when abs(log_ratio) < 1e-300 then cast(1 as double)
            else
                (
                    case
                        when growth_ratio = 1 then log_ratio
                        else (growth_ratio - 1) * log_ratio / ln(growth_ratio)
                    end
                )
                / (
                    cast(period_number as double)
                    * case
                        when growth_ratio_per_period = 1
                            then log_ratio / cast(period_number as double)
                        else
                            (growth_ratio_per_period - 1)
                            * (log_ratio / cast(period_number as double))
                            / ln(growth_ratio_per_period)
                    end
                )
        end
        * exp(
            cum_log_policy * cast(period_number - 1 as double) / cast(period_number as double)
        ) as menchero_scale
    from grown
    window
        through_current as (
            partition by portfolio_id
            order by period_index
            rows between unbounded preceding and current row
        )
),

menchero as (
    select
        portfolio_id,
        period_index,
        period_number,
        n_periods,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing,
        cum_log_portfolio,
        cum_log_policy,
        cum_portfolio_return,
        cum_policy_return,
        policy_growth,
        carino_coefficient,
        menchero_scale,
        case
            when sum_gap_squared > 0
                then
                    (cum_portfolio_return - cum_policy_return - menchero_scale * sum_gap)
                    / sum_gap_squared
            else cast(0 as double)
        end as menchero_tilt,
        sum_static_allocation,
        sum_timing,
        sum_selection,
        sum_interaction,
        sum_residual,
        sum_gap_static_allocation,
        sum_gap_timing,
        sum_gap_selection,
        sum_gap_interaction,
        sum_gap_residual,
        sum_carino_static_allocation,
        sum_carino_timing,
        sum_carino_selection,
        sum_carino_interaction,
        sum_carino_residual,
        sum_grap_static_allocation,
        sum_grap_timing,
        sum_grap_selection,
        sum_grap_interaction,
        sum_grap_residual
    from coefficients
),

linked as (
    select
        m.portfolio_id,
        m.period_index,
        m.period_number,
        m.n_periods,
        m.period_start,
        m.period_end,
        m.return_source,
        m.portfolio_return,
        m.computed_return,
        m.policy_return,
        m.active_return,
        m.static_allocation,
        m.timing,
        m.selection,
        m.interaction,
        m.residual,
        m.is_drifted,
        m.n_selection_missing,
        m.is_reported_missing,
        m.cum_log_portfolio,
        m.cum_log_policy,
        m.carino_coefficient,
        m.cum_portfolio_return,
        m.cum_policy_return,
        m.cum_portfolio_return - m.cum_policy_return as cum_active_return,
        case
            when m.static_allocation is null then cast(null as double)
            when o.linking = 'carino' then m.sum_carino_static_allocation / m.carino_coefficient
            when o.linking = 'menchero'
                then
                    m.menchero_scale * m.sum_static_allocation
                    + m.menchero_tilt * m.sum_gap_static_allocation
            else m.policy_growth * m.sum_grap_static_allocation
        end as cum_static_allocation,
        case
            when m.timing is null then cast(null as double)
            when o.linking = 'carino' then m.sum_carino_timing / m.carino_coefficient
            when o.linking = 'menchero'
                then m.menchero_scale * m.sum_timing + m.menchero_tilt * m.sum_gap_timing
            else m.policy_growth * m.sum_grap_timing
        end as cum_timing,
        case
            when m.selection is null then cast(null as double)
            when o.linking = 'carino' then m.sum_carino_selection / m.carino_coefficient
            when o.linking = 'menchero'
                then m.menchero_scale * m.sum_selection + m.menchero_tilt * m.sum_gap_selection
            else m.policy_growth * m.sum_grap_selection
        end as cum_selection,
        case
            when m.interaction is null then cast(null as double)
            when o.linking = 'carino' then m.sum_carino_interaction / m.carino_coefficient
            when o.linking = 'menchero'
                then
                    m.menchero_scale * m.sum_interaction
                    + m.menchero_tilt * m.sum_gap_interaction
            else m.policy_growth * m.sum_grap_interaction
        end as cum_interaction,
        case
            when m.residual is null then cast(null as double)
            when o.linking = 'carino' then m.sum_carino_residual / m.carino_coefficient
            when o.linking = 'menchero'
                then m.menchero_scale * m.sum_residual + m.menchero_tilt * m.sum_gap_residual
            else m.policy_growth * m.sum_grap_residual
        end as cum_residual
    from menchero as m
    cross join run_options as o
)

select * from linked
