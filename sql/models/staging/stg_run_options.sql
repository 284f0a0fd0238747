-- run_options: one row holding the options of the run (static_mode 'window', 'expanding' or
-- 'trailing' with static_periods N; form 'bf' or 'bhb'; linking 'carino', 'menchero', 'grap'
-- or 'frongello'; weight_tolerance). Rename and cast only; int_shared_issues_found checks it.
with source as (
    select * from run_options
),

renamed as (
    select
        cast(static_mode as varchar) as static_mode,
        cast(static_periods as integer) as static_periods,
        cast(form as varchar) as form,
        cast(linking as varchar) as linking,
        cast(weight_tolerance as double) as weight_tolerance
    from source
)

select * from renamed
