-- The static weight of each class and period (DESIGN §3, run_options.static_mode):
-- 'window', the mean weight over the portfolio's window (the static/dynamic split of Hsu,
-- Kalesnik & Myers 2010, FAJ 66(6)); 'expanding', the mean of the weights of all earlier
-- periods; 'trailing', the mean of the previous static_periods periods (fewer at the
-- start). In the two ex-ante modes the first period uses its own weight, so its timing is 0.
-- Means are taken of the deviations from the first period's weight, as the local engine
-- does, so constant weights give a static weight equal to them and a timing of exactly 0.
with weights as (
    select * from int_weights_drifted
),

run_options as (
    select * from stg_run_options
),

deviations as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        asset_class,
        is_holding,
        has_segments,
        weight,
        policy_weight,
        index_return,
        segment_return,
        first_value(weight) over (
            partition by portfolio_id, asset_class
            order by period_index
            rows between unbounded preceding and current row
        ) as reference_weight,
        row_number() over (
            partition by portfolio_id, asset_class order by period_index
        ) as period_number
    from weights
),

running as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        asset_class,
        is_holding,
        has_segments,
        weight,
        policy_weight,
        index_return,
        segment_return,
        reference_weight,
        period_number,
        avg(weight - reference_weight) over (
            partition by portfolio_id, asset_class
        ) as window_mean_deviation,
        coalesce(
            sum(weight - reference_weight) over (
                partition by portfolio_id, asset_class
                order by period_index
                rows between unbounded preceding and 1 preceding
            ),
            0
        ) as deviation_before
    from deviations
),

with_trailing as (
    -- the sum of the deviations before t minus the same sum static_periods periods earlier
    -- is the sum over the previous static_periods periods (a self-join: window frames
    -- cannot take their length from a column)
    select
        r.portfolio_id,
        r.period_index,
        r.period_start,
        r.period_end,
        r.asset_class,
        r.is_holding,
        r.has_segments,
        r.weight,
        r.policy_weight,
        r.index_return,
        r.segment_return,
        r.reference_weight,
        r.period_number,
        r.window_mean_deviation,
        r.deviation_before,
        r.deviation_before - coalesce(earlier.deviation_before, 0) as deviation_trailing,
        o.static_mode,
        o.static_periods
    from running as r
    cross join run_options as o
    left join running as earlier
        on
            o.static_mode = 'trailing'
            and r.portfolio_id = earlier.portfolio_id
            and r.asset_class = earlier.asset_class
            and r.period_index - o.static_periods = earlier.period_index
),

averaged as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        asset_class,
        is_holding,
        has_segments,
        weight,
        case
            when static_mode = 'window' then reference_weight + window_mean_deviation
            when period_number = 1 then weight
            when static_mode = 'expanding'
                then reference_weight + deviation_before / cast(period_number - 1 as double)
            when static_mode = 'trailing'
                then
                    reference_weight
                    + deviation_trailing
                    / cast(least(period_number - 1, static_periods) as double)
        end as static_weight,
        policy_weight,
        index_return,
        segment_return
    from with_trailing
)

select * from averaged
