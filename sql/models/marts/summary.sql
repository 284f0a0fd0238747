-- summary (DESIGN §5): one row per evaluated portfolio, its whole record linked, with the
-- columns and order of the local engine's summary table (the timing-test columns aside).
-- Annualised (common practice, no source), with p periods a year and n periods, for
-- records of at least a year (else null): R_ann = (1 + R)^(p/n) - 1, likewise B_ann,
-- active_ann = R_ann - B_ann, and each linked effect E_ann = E k(R, B) (p/n) / k(R_ann,
-- B_ann) with Carino's k(a, b) = ln((1 + a)/(1 + b)) / (a - b), so they still add up.
-- tracking_error = sample standard deviation of R_t - B_t times sqrt(p);
-- information_ratio = active_ann / tracking_error (Grinold & Kahn).
with linked as (
    select * from int_periods_linked
),

calendar as (
    select * from int_calendar_inferred
),

run_options as (
    select * from stg_run_options
),

frequency as (
    select max(periods_per_year) as periods_per_year
    from calendar
),

record as (
    select
        portfolio_id,
        min(period_end) as first_period,
        max(period_end) as last_period,
        avg(active_return) as mean_active_return,
        cast(sum(case when is_drifted then 1 else 0 end) as bigint) as n_drifted_periods,
        cast(sum(n_selection_missing) as bigint) as n_selection_missing
    from linked
    group by portfolio_id
),

spread as (
    select
        l.portfolio_id,
        sum(
            (l.active_return - r.mean_active_return) * (l.active_return - r.mean_active_return)
        ) as sum_squared_deviations
    from linked as l
    inner join record as r
        on l.portfolio_id = r.portfolio_id
    group by l.portfolio_id
),

totals as (
    select
        l.portfolio_id,
        r.first_period,
        r.last_period,
        cast(l.n_periods as bigint) as n_periods,
        l.return_source,
        l.cum_portfolio_return as portfolio_return,
        l.cum_policy_return as policy_return,
        l.cum_active_return as active_return,
        l.cum_static_allocation as static_allocation,
        l.cum_timing as timing,
        l.cum_selection as selection,
        l.cum_interaction as interaction,
        l.cum_residual as residual,
        o.linking,
        l.n_periods >= f.periods_per_year as is_annualised,
        cast(f.periods_per_year as double) / cast(l.n_periods as double) as years_inverse,
        l.cum_log_portfolio,
        l.cum_log_policy,
        l.carino_coefficient,
        case
            when l.n_periods > 1
                then
                    sqrt(s.sum_squared_deviations / cast(l.n_periods - 1 as double))
                    * sqrt(cast(f.periods_per_year as double))
        end as tracking_error,
        r.n_drifted_periods,
        r.n_selection_missing
    from linked as l
    inner join record as r
        on l.portfolio_id = r.portfolio_id
    inner join spread as s
        on l.portfolio_id = s.portfolio_id
    cross join frequency as f
    cross join run_options as o
    where l.period_number = l.n_periods
),

annualised_returns as (
    select
        portfolio_id,
        first_period,
        last_period,
        n_periods,
        return_source,
        portfolio_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        linking,
        is_annualised,
        years_inverse,
        carino_coefficient,
        case
            when is_annualised then exp(cum_log_portfolio * years_inverse) - 1
        end as portfolio_return_ann,
        case
            when is_annualised then exp(cum_log_policy * years_inverse) - 1
        end as policy_return_ann,
        -- (1 + R_ann)/(1 + B_ann), for Carino's k of the annualised returns
        case
            when is_annualised then exp((cum_log_portfolio - cum_log_policy) * years_inverse)
        end as growth_ratio_ann,
        case
            when is_annualised then exp(cum_log_policy * years_inverse)
        end as policy_growth_ann,
        tracking_error,
        n_drifted_periods,
        n_selection_missing
    from totals
),

scaled as (
    select
        portfolio_id,
        first_period,
        last_period,
        n_periods,
        return_source,
        portfolio_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        linking,
        portfolio_return_ann,
        policy_return_ann,
        portfolio_return_ann - policy_return_ann as active_return_ann,
        case
            when not is_annualised then cast(null as double)
            when growth_ratio_ann = 1
                then carino_coefficient * years_inverse * policy_growth_ann
            else
                carino_coefficient * years_inverse
                / (ln(growth_ratio_ann) / (growth_ratio_ann - 1) / policy_growth_ann)
        end as annual_scale,
        tracking_error,
        n_drifted_periods,
        n_selection_missing
    from annualised_returns
),

summary as (
    select
        portfolio_id,
        first_period,
        last_period,
        n_periods,
        return_source,
        portfolio_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        linking,
        portfolio_return_ann,
        policy_return_ann,
        active_return_ann,
        static_allocation * annual_scale as static_allocation_ann,
        timing * annual_scale as timing_ann,
        selection * annual_scale as selection_ann,
        interaction * annual_scale as interaction_ann,
        residual * annual_scale as residual_ann,
        tracking_error,
        case
            when tracking_error > 0 then active_return_ann / tracking_error
        end as information_ratio,
        n_drifted_periods,
        n_selection_missing
    from scaled
)

select * from summary
